//! Pure functions of (scores, labels, threshold): the confusion matrix, the
//! rates derived from it, the ranking metrics (average precision, ROC AUC),
//! Wilson and Clopper-Pearson intervals, and a seeded stratified bootstrap.
//!
//! No I/O and no formatting. A rate whose denominator is zero is `None`, never
//! a made-up 0 or 1. The bootstrap draws each replicate from its own ChaCha
//! stream, so its result is the same bits whatever the number of threads.

use rayon::prelude::*;

use crate::spec::BootstrapPlan;

/// z for a two-sided 95 % interval: Φ⁻¹(0.975), as used in Newcombe (1998).
pub const Z_95: f64 = 1.959_963_984_540_054;

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

/// Clopper-Pearson ("exact") interval for k successes in n trials: the
/// α/2 and 1 − α/2 quantiles of Beta(k, n − k + 1) and Beta(k + 1, n − k)
/// (Clopper and Pearson 1934; method 5 of Newcombe 1998). `None` when n = 0.
pub fn clopper_pearson(k: u64, n: u64, confidence: f64) -> Option<Interval> {
    if n == 0 {
        return None;
    }
    let alpha = 1.0 - confidence;
    let (k_f, n_f) = (k as f64, n as f64);
    let low = if k == 0 {
        0.0
    } else {
        statrs::function::beta::inv_beta_reg(k_f, n_f - k_f + 1.0, alpha / 2.0)
    };
    let high = if k == n {
        1.0
    } else {
        statrs::function::beta::inv_beta_reg(k_f + 1.0, n_f - k_f, 1.0 - alpha / 2.0)
    };
    Some(Interval { low, high })
}

/// Rows in ranking order: scores from high to low (ties by row), the labels
/// in that order, and where each group of tied scores ends.
///
/// One ranking serves every consumer of a split's scores (the threshold
/// search, the metrics, the bootstrap and the figures), so each candidate's
/// scores on a split are sorted once.
#[derive(Debug, Clone)]
pub struct Ranked {
    pub(crate) order: Vec<usize>,
    /// The scores in that order (`scores[order[k]]`).
    pub(crate) sorted: Vec<f64>,
    pub(crate) anomalous: Vec<bool>,
    pub(crate) ends: Vec<usize>,
}

impl Ranked {
    /// Ranks `scores` (no NaN) with their labels.
    pub fn new(scores: &[f64], is_anomaly: &[bool]) -> Self {
        ranked(scores, is_anomaly)
    }

    /// Rows ranked.
    pub fn len(&self) -> usize {
        self.order.len()
    }

    /// `true` when no row is ranked.
    pub fn is_empty(&self) -> bool {
        self.order.is_empty()
    }
}

/// A key whose unsigned order is `f64::total_cmp`'s order of `v`.
fn total_order_key(v: f64) -> u64 {
    let b = v.to_bits();
    // Negative numbers: flip every bit (larger magnitude sorts lower);
    // positive: flip only the sign bit (so they sort above the negatives).
    b ^ ((((b as i64) >> 63) as u64) | (1 << 63))
}

fn ranked(scores: &[f64], is_anomaly: &[bool]) -> Ranked {
    // Sorting (descending score key, row) packed into one integer gives the
    // order of a stable sort by descending `total_cmp`: the keys are unique,
    // so an unstable sort has only one answer.
    use rayon::prelude::*;
    let mut keys: Vec<u128> = scores
        .iter()
        .enumerate()
        .map(|(i, &v)| (u128::from(!total_order_key(v)) << 64) | i as u128)
        .collect();
    keys.par_sort_unstable();
    let order: Vec<usize> = keys.iter().map(|&k| k as u64 as usize).collect();
    drop(keys);
    // Gathered in tight passes, so that the scattered loads overlap.
    let sorted: Vec<f64> = order.iter().map(|&i| scores[i]).collect();
    let anomalous = order.iter().map(|&i| is_anomaly[i]).collect();
    let mut ends = Vec::new();
    for k in 1..=sorted.len() {
        if k == sorted.len() || sorted[k].total_cmp(&sorted[k - 1]).is_ne() {
            ends.push(k);
        }
    }
    Ranked {
        order,
        sorted,
        anomalous,
        ends,
    }
}

/// Average precision and ROC AUC with a weight per ranking position (how
/// often a row is drawn; 1 without a bootstrap), walking the distinct scores
/// from high to low. `p_total` and `n_total` are the weights' sums by class.
fn ranking(
    r: &Ranked,
    weight: impl Fn(usize) -> f64,
    p_total: f64,
    n_total: f64,
) -> (Option<f64>, Option<f64>) {
    let (mut tp, mut fp, mut ap, mut u, mut neg_above) = (0.0, 0.0, 0.0, 0.0, 0.0);
    let mut start = 0;
    for &end in &r.ends {
        let (mut p, mut n) = (0.0, 0.0);
        for k in start..end {
            if r.anomalous[k] {
                p += weight(k);
            } else {
                n += weight(k);
            }
        }
        start = end;
        tp += p;
        fp += n;
        if p > 0.0 {
            ap += (p / p_total) * (tp / (tp + fp));
        }
        // Positives here beat the negatives below; ties count one half.
        u += p * (n_total - neg_above - n) + 0.5 * p * n;
        neg_above += n;
    }
    let ap = (p_total > 0.0).then_some(ap);
    let auc = (p_total > 0.0 && n_total > 0.0).then(|| u / (p_total * n_total));
    (ap, auc)
}

/// What a bootstrap replicate needs, fixed once per split: the tie groups
/// of ranking positions that hold an anomaly, and for every row the bucket
/// its draws are counted in. A replicate then counts draws in a few thousand
/// buckets (in cache) instead of weighting every ranking position.
struct Buckets {
    /// Tie groups holding an anomaly, in ranking order, as indices into
    /// `bounds`: the group is ranks `bounds[start] .. bounds[end]`.
    groups: Vec<(usize, usize)>,
    /// Sorted distinct cut ranks: every such group's start and end, and the
    /// number of flagged positions.
    bounds: Vec<usize>,
    /// `bounds` index of the flagged count.
    flagged: usize,
    /// Per anomaly (row order within its class): its group.
    pos_group: Vec<u32>,
    /// Per normal row (row order within its class): its bucket, the number
    /// of cut ranks at or below its rank; bucket `j` holds ranks
    /// `bounds[j-1] .. bounds[j]`.
    neg_bucket: Vec<u32>,
    /// The same in 16 bits when the buckets allow it: the table is read at a
    /// random place for every draw, and half the size stays in cache.
    neg_bucket16: Option<Vec<u16>>,
}

impl Buckets {
    fn new(r: &Ranked, pos_rank: &[u32], neg_rank: &[u32], flagged: usize) -> Self {
        let mut spans = Vec::new();
        let mut start = 0;
        for &end in &r.ends {
            if r.anomalous[start..end].iter().any(|&a| a) {
                spans.push((start, end));
            }
            start = end;
        }
        let mut bounds: Vec<usize> = spans
            .iter()
            .flat_map(|&(s, e)| [s, e])
            .chain([flagged])
            .collect();
        bounds.sort_unstable();
        bounds.dedup();
        let at = |rank: usize| bounds.partition_point(|&b| b < rank);
        let groups: Vec<(usize, usize)> = spans.iter().map(|&(s, e)| (at(s), at(e))).collect();
        let group_of = |rank: usize| spans.partition_point(|&(_, e)| e <= rank) as u32;
        let neg_bucket: Vec<u32> = neg_rank
            .iter()
            .map(|&k| bounds.partition_point(|&b| b <= k as usize) as u32)
            .collect();
        let neg_bucket16 = (bounds.len() < usize::from(u16::MAX))
            .then(|| neg_bucket.iter().map(|&b| b as u16).collect());
        Buckets {
            flagged: at(flagged),
            pos_group: pos_rank.iter().map(|&k| group_of(k as usize)).collect(),
            neg_bucket,
            neg_bucket16,
            groups,
            bounds,
        }
    }

    /// F1 at τ, average precision and ROC AUC of one replicate, from its
    /// draw counts per anomaly group (`p_in`) and per normal bucket (`n_in`).
    ///
    /// The same arithmetic as [`ranking`] with integer weights: every running
    /// count is an exact integer in binary64, and a group without a drawn
    /// anomaly adds exactly zero to both sums, so the bits are the same (a
    /// test compares them).
    fn replicate(&self, p_in: &[u64], n_in: &[u64], p_total: f64, n_total: f64) -> (f64, f64, f64) {
        let (mut ap, mut u) = (0.0, 0.0);
        let (mut pos_above, mut neg_above) = (0u64, 0u64);
        let (mut tp_flagged, mut fp_flagged) = (0u64, 0u64);
        let mut bucket = 0; // next normal bucket not yet counted
        for (g, &(start, end)) in self.groups.iter().enumerate() {
            // Buckets 0..=start hold the ranks before the group.
            while bucket <= start {
                neg_above += n_in[bucket];
                bucket += 1;
            }
            let mut n = 0;
            while bucket <= end {
                n += n_in[bucket];
                bucket += 1;
            }
            let p = p_in[g];
            if p > 0 {
                let (pf, nf) = (p as f64, n as f64);
                let (tp, fp) = ((pos_above + p) as f64, (neg_above + n) as f64);
                ap += (pf / p_total) * (tp / (tp + fp));
                u += pf * (n_total - neg_above as f64 - nf) + 0.5 * pf * nf;
            }
            pos_above += p;
            neg_above += n;
            if end <= self.flagged {
                tp_flagged = pos_above;
            }
        }
        // Normal draws above the flagged count: buckets 0..=flagged.
        for &c in &n_in[..=self.flagged.min(n_in.len() - 1)] {
            fp_flagged += c;
        }
        let c = Confusion {
            tp: tp_flagged,
            fp: fp_flagged,
            fn_: p_total as u64 - tp_flagged,
            tn: n_total as u64 - fp_flagged,
        };
        let ap = (p_total > 0.0).then_some(ap);
        let auc = (p_total > 0.0 && n_total > 0.0).then(|| u / (p_total * n_total));
        (
            c.f1().unwrap_or(f64::NAN),
            ap.unwrap_or(f64::NAN),
            auc.unwrap_or(f64::NAN),
        )
    }
}

/// Unweighted average precision and ROC AUC.
fn ap_auc(scores: &[f64], is_anomaly: &[bool]) -> (Option<f64>, Option<f64>) {
    ap_auc_ranked(&ranked(scores, is_anomaly))
}

fn ap_auc_ranked(r: &Ranked) -> (Option<f64>, Option<f64>) {
    let p = r.anomalous.iter().filter(|&&a| a).count() as f64;
    let n = r.anomalous.len() as f64 - p;
    ranking(r, |_| 1.0, p, n)
}

/// Average precision as scikit-learn defines it: Σₙ (Rₙ − Rₙ₋₁) Pₙ over the
/// distinct thresholds, without interpolation (tied scores form one step).
pub fn average_precision(scores: &[f64], is_anomaly: &[bool]) -> Option<f64> {
    ap_auc(scores, is_anomaly).0
}

/// ROC AUC as the Mann-Whitney statistic U / (n₁ n₀), ties counted one half.
pub fn roc_auc(scores: &[f64], is_anomaly: &[bool]) -> Option<f64> {
    ap_auc(scores, is_anomaly).1
}

/// Percentile intervals from the stratified bootstrap.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct BootstrapIntervals {
    /// F1 at the fixed τ.
    pub f1: Option<Interval>,
    /// Average precision.
    pub average_precision: Option<Interval>,
    /// ROC AUC.
    pub roc_auc: Option<Interval>,
}

/// The `q` quantile of sorted values, interpolating linearly between order
/// statistics (numpy's default "linear" method).
fn quantile(sorted: &[f64], q: f64) -> f64 {
    let pos = q * (sorted.len() - 1) as f64;
    let (lo, hi) = (pos.floor() as usize, pos.ceil() as usize);
    sorted[lo] + (pos - lo as f64) * (sorted[hi] - sorted[lo])
}

fn interval(mut v: Vec<f64>, confidence: f64) -> Option<Interval> {
    v.retain(|x| x.is_finite());
    if v.is_empty() {
        return None;
    }
    v.sort_by(f64::total_cmp);
    let a = (1.0 - confidence) / 2.0;
    Some(Interval {
        low: quantile(&v, a),
        high: quantile(&v, 1.0 - a),
    })
}

/// Stratified bootstrap: each replicate draws the anomalies and the normal
/// rows separately, with replacement, keeping both counts; replicate `b` uses
/// ChaCha8 stream `b` of `seed`, so results do not depend on thread count.
pub fn bootstrap(
    scores: &[f64],
    is_anomaly: &[bool],
    tau: f64,
    plan: BootstrapPlan,
    confidence: f64,
) -> BootstrapIntervals {
    bootstrap_with(scores, is_anomaly, None, tau, plan, confidence)
}

/// [`bootstrap`] with the scores' ranking when it is already at hand.
fn bootstrap_with(
    scores: &[f64],
    is_anomaly: &[bool],
    ranked_scores: Option<&Ranked>,
    tau: f64,
    plan: BootstrapPlan,
    confidence: f64,
) -> BootstrapIntervals {
    let none = BootstrapIntervals {
        f1: None,
        average_precision: None,
        roc_auc: None,
    };
    let pos: Vec<usize> = (0..scores.len()).filter(|&i| is_anomaly[i]).collect();
    let neg: Vec<usize> = (0..scores.len()).filter(|&i| !is_anomaly[i]).collect();
    if plan.replicates == 0 || pos.is_empty() || neg.is_empty() {
        return none;
    }
    // Weights are kept by ranking position, so a replicate is one sequential
    // pass; the draws are made in row order within each class.
    let owned;
    let r = match ranked_scores {
        Some(r) => r,
        None => {
            owned = ranked(scores, is_anomaly);
            &owned
        }
    };
    let mut rank = vec![0u32; scores.len()];
    for (k, &i) in r.order.iter().enumerate() {
        rank[i] = k as u32;
    }
    let pos_rank: Vec<u32> = pos.iter().map(|&i| rank[i]).collect();
    let neg_rank: Vec<u32> = neg.iter().map(|&i| rank[i]).collect();
    let flagged = r.sorted.iter().take_while(|&&v| v > tau).count();
    let buckets = Buckets::new(r, &pos_rank, &neg_rank, flagged);
    let (p_total, n_total) = (pos.len() as f64, neg.len() as f64);
    let reps: Vec<(f64, f64, f64)> = (0..plan.replicates)
        .into_par_iter()
        .map_init(
            || {
                (
                    vec![0u64; buckets.groups.len()],
                    vec![0u64; buckets.bounds.len() + 1],
                )
            },
            |(p_in, n_in), b| {
                p_in.fill(0);
                n_in.fill(0);
                let mut rng = crate::rng::seeded(plan.seed, u64::from(b));
                let len = pos_rank.len() as u64;
                for _ in 0..pos_rank.len() {
                    p_in[buckets.pos_group[crate::rng::below(&mut rng, len) as usize] as usize] +=
                        1;
                }
                let len = neg_rank.len() as u64;
                match &buckets.neg_bucket16 {
                    Some(table) => {
                        for _ in 0..neg_rank.len() {
                            n_in[usize::from(table[crate::rng::below(&mut rng, len) as usize])] +=
                                1;
                        }
                    }
                    None => {
                        for _ in 0..neg_rank.len() {
                            n_in[buckets.neg_bucket[crate::rng::below(&mut rng, len) as usize]
                                as usize] += 1;
                        }
                    }
                }
                buckets.replicate(p_in, n_in, p_total, n_total)
            },
        )
        .collect();
    BootstrapIntervals {
        f1: interval(reps.iter().map(|r| r.0).collect(), confidence),
        average_precision: interval(reps.iter().map(|r| r.1).collect(), confidence),
        roc_auc: interval(reps.iter().map(|r| r.2).collect(), confidence),
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
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
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

/// Two intervals for one proportion.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct ProportionIntervals {
    /// Wilson score interval.
    pub wilson: Option<Interval>,
    /// Clopper-Pearson interval.
    pub clopper_pearson: Option<Interval>,
}

fn proportion(k: u64, n: u64) -> ProportionIntervals {
    ProportionIntervals {
        wilson: wilson(k, n, Z_95),
        clopper_pearson: clopper_pearson(k, n, 0.95),
    }
}

/// The metrics reported for one candidate on one split (intervals at 95 %).
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct Metrics {
    /// The confusion matrix.
    pub confusion: Confusion,
    /// Precision.
    pub precision: Option<f64>,
    /// Recall (true-positive rate).
    pub recall: Option<f64>,
    /// F1.
    pub f1: Option<f64>,
    /// Fβ with the β of the threshold policy (`max-f-beta`), else null.
    pub f_beta: Option<f64>,
    /// Specificity (true-negative rate).
    pub specificity: Option<f64>,
    /// False-positive rate.
    pub false_positive_rate: Option<f64>,
    /// Balanced accuracy.
    pub balanced_accuracy: Option<f64>,
    /// Matthews correlation.
    pub mcc: Option<f64>,
    /// Average precision (threshold-free).
    pub average_precision: Option<f64>,
    /// ROC AUC (threshold-free; ties count one half).
    pub roc_auc: Option<f64>,
    /// Accuracy: misleading on skewed labels, reported only beside that warning.
    pub accuracy: Option<f64>,
    /// Intervals for precision.
    pub precision_95: ProportionIntervals,
    /// Intervals for recall.
    pub recall_95: ProportionIntervals,
    /// Intervals for the false-positive rate.
    pub false_positive_rate_95: ProportionIntervals,
    /// Stratified-bootstrap intervals for F1, average precision and ROC AUC.
    pub bootstrap_95: BootstrapIntervals,
}

impl Metrics {
    /// Every metric of scores against labels at τ.
    pub fn of(
        scores: &[f64],
        is_anomaly: &[bool],
        tau: f64,
        beta: Option<f64>,
        boot: BootstrapPlan,
    ) -> Self {
        Metrics::of_ranked(
            scores,
            is_anomaly,
            &ranked(scores, is_anomaly),
            tau,
            beta,
            boot,
        )
    }

    /// [`Metrics::of`] with the scores' ranking already at hand (the same
    /// numbers, one sort fewer).
    pub fn of_ranked(
        scores: &[f64],
        is_anomaly: &[bool],
        ranked_scores: &Ranked,
        tau: f64,
        beta: Option<f64>,
        boot: BootstrapPlan,
    ) -> Self {
        debug_assert_eq!(ranked_scores.len(), scores.len());
        let c = Confusion::at(scores, is_anomaly, tau);
        let (ap, auc) = ap_auc_ranked(ranked_scores);
        Metrics {
            confusion: c,
            precision: c.precision(),
            recall: c.recall(),
            f1: c.f1(),
            f_beta: beta.and_then(|b| c.f_beta(b)),
            specificity: c.specificity(),
            false_positive_rate: c.false_positive_rate(),
            balanced_accuracy: c.balanced_accuracy(),
            mcc: c.mcc(),
            average_precision: ap,
            roc_auc: auc,
            accuracy: c.accuracy(),
            precision_95: proportion(c.tp, c.tp + c.fp),
            recall_95: proportion(c.tp, c.tp + c.fn_),
            false_positive_rate_95: proportion(c.fp, c.fp + c.tn),
            bootstrap_95: bootstrap_with(scores, is_anomaly, Some(ranked_scores), tau, boot, 0.95),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand_chacha::rand_core::{Rng, SeedableRng};

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

    /// Newcombe (1998) Table I, method 5 (Clopper-Pearson), via REFERENCES.md
    /// section 1 (statsmodels 0.15.0 `proportion_confint(method='beta')`).
    #[test]
    fn clopper_pearson_matches_newcombe_table_one() {
        let cases = [
            (81, 263, 0.25273674558527126, 0.3676219226013514),
            (15, 148, 0.05784401008344857, 0.161650490349479),
            (0, 20, 0.0, 0.16843347098308534),
            (1, 29, 0.000872646883579922, 0.17764429548872293),
        ];
        for (k, n, lo, hi) in cases {
            let c = clopper_pearson(k, n, 0.95).unwrap();
            assert!((c.low - lo).abs() <= 1e-9, "{k}/{n} low {}", c.low);
            assert!((c.high - hi).abs() <= 1e-9, "{k}/{n} high {}", c.high);
        }
    }

    /// Exact coverage Σₖ 1{p ∈ CI(k)} Binom(k; n, p), REFERENCES.md section 1
    /// [LIB]: Wilson n=20, p=0.1 → 0.9568255047155365; C-P → 0.988746865835491.
    #[test]
    fn exact_coverage_matches_the_reference() {
        let coverage = |n: u64, p: f64, ci: &dyn Fn(u64, u64) -> Interval| -> f64 {
            (0..=n)
                .map(|k| {
                    let i = ci(k, n);
                    let pmf = statrs::function::factorial::binomial(n, k)
                        * p.powi(k as i32)
                        * (1.0 - p).powi((n - k) as i32);
                    if i.low <= p && p <= i.high {
                        pmf
                    } else {
                        0.0
                    }
                })
                .sum()
        };
        let w = coverage(20, 0.1, &|k, n| wilson(k, n, Z_95).unwrap());
        let c = coverage(20, 0.1, &|k, n| clopper_pearson(k, n, 0.95).unwrap());
        assert!((w - 0.9568255047155365).abs() < 1e-9, "{w}");
        assert!((c - 0.988746865835491).abs() < 1e-9, "{c}");
        let c50 = coverage(50, 0.05, &|k, n| clopper_pearson(k, n, 0.95).unwrap());
        assert!((c50 - 0.9882135522027359).abs() < 1e-9, "{c50}");
    }

    /// REFERENCES.md section 4 (scikit-learn 1.9.1 on tied scores):
    /// AP = 31/48, AUC = 37/48.
    #[test]
    fn ranking_metrics_match_scikit_learn_on_ties() {
        let y = [
            false, false, true, true, false, true, false, false, true, false,
        ];
        let s = [0.1, 0.4, 0.35, 0.8, 0.4, 0.7, 0.8, 0.35, 0.8, 0.05];
        assert!((average_precision(&s, &y).unwrap() - 0.6458333333333333).abs() < 1e-12);
        assert!((roc_auc(&s, &y).unwrap() - 0.7708333333333334).abs() < 1e-12);
    }

    /// REFERENCES.md section 5: MCC = 0.7615240523537039, balanced accuracy
    /// 0.899246231155779, specificity 1987/1990, F2 = 40/51.
    #[test]
    fn mcc_and_balanced_accuracy_match_the_formulas() {
        let c = Confusion {
            tp: 8,
            fp: 3,
            fn_: 2,
            tn: 1987,
        };
        assert!((c.mcc().unwrap() - 0.7615240523537039).abs() < 1e-12);
        assert!((c.balanced_accuracy().unwrap() - 0.899246231155779).abs() < 1e-12);
        assert!((c.specificity().unwrap() - 0.9984924623115577).abs() < 1e-12);
        assert!((c.f_beta(2.0).unwrap() - 0.7843137254901961).abs() < 1e-12);
        assert!((c.f_beta(0.5).unwrap() - 0.7407407407407407).abs() < 1e-12);
    }

    /// The packed-key sort gives exactly the order of a stable sort by
    /// descending `f64::total_cmp` (ties in row order), including signed
    /// zeros, infinities and many ties (common practice, no source: the
    /// order is checked against the standard library's own comparison).
    #[test]
    fn ranking_is_the_stable_descending_total_order() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let specials = [
            0.0,
            -0.0,
            f64::INFINITY,
            f64::NEG_INFINITY,
            f64::MIN_POSITIVE,
            -1e-300,
        ];
        for case in 0..200 {
            let n = (rng.next_u32() % 300) as usize;
            let s: Vec<f64> = (0..n)
                .map(|_| match rng.next_u32() % 4 {
                    0 => specials[(rng.next_u32() % 6) as usize],
                    1 => f64::from(rng.next_u32() % 5) - 2.0,
                    _ => (f64::from(rng.next_u32()) - 2e9) * 1e-3,
                })
                .collect();
            let y: Vec<bool> = (0..n).map(|_| rng.next_u32() % 3 == 0).collect();
            let mut want: Vec<usize> = (0..n).collect();
            want.sort_by(|&a, &b| s[b].total_cmp(&s[a]));
            let r = Ranked::new(&s, &y);
            assert_eq!(r.order, want, "case {case}");
            let labels: Vec<bool> = want.iter().map(|&i| y[i]).collect();
            assert_eq!(r.anomalous, labels);
            let groups = 1
                + (1..n)
                    .filter(|&k| s[want[k]].total_cmp(&s[want[k - 1]]).is_ne())
                    .count();
            assert_eq!(r.ends.len(), if n == 0 { 0 } else { groups });
        }
    }

    /// A replicate counted by buckets gives the same bits as weighting every
    /// ranking position by its draws and walking them all ([`ranking`] and a
    /// full confusion count), on scores with many ties.
    #[test]
    fn bucketed_replicate_equals_the_weighted_pass() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(21);
        for case in 0..300 {
            let n = 2 + (rng.next_u32() % 400) as usize;
            let levels = 1 + rng.next_u32() % 50;
            let mut y: Vec<bool> = (0..n).map(|_| rng.next_u32().is_multiple_of(7)).collect();
            y[0] = true;
            y[1] = false;
            let s: Vec<f64> = (0..n)
                .map(|i| f64::from(rng.next_u32() % levels) + if y[i] { 1.5 } else { 0.0 })
                .collect();
            let tau = f64::from(rng.next_u32() % (levels + 2)) - 0.5;
            let r = ranked(&s, &y);
            let mut rank = vec![0u32; n];
            for (k, &i) in r.order.iter().enumerate() {
                rank[i] = k as u32;
            }
            let pos: Vec<u32> = (0..n).filter(|&i| y[i]).map(|i| rank[i]).collect();
            let neg: Vec<u32> = (0..n).filter(|&i| !y[i]).map(|i| rank[i]).collect();
            let flagged = r.order.iter().take_while(|&&i| s[i] > tau).count();
            let b = Buckets::new(&r, &pos, &neg, flagged);
            // One replicate's draws, counted both ways.
            let mut w = vec![0u32; n];
            let mut p_in = vec![0u64; b.groups.len()];
            let mut n_in = vec![0u64; b.bounds.len() + 1];
            for (k, stratum) in [&pos, &neg].into_iter().enumerate() {
                for _ in 0..stratum.len() {
                    let i = (rng.next_u32() as usize) % stratum.len();
                    w[stratum[i] as usize] += 1;
                    if k == 0 {
                        p_in[b.pos_group[i] as usize] += 1;
                    } else {
                        n_in[b.neg_bucket[i] as usize] += 1;
                    }
                }
            }
            let (pt, nt) = (pos.len() as f64, neg.len() as f64);
            let mut c = Confusion::default();
            for (k, (&wk, &a)) in w.iter().zip(&r.anomalous).enumerate() {
                let wk = u64::from(wk);
                match (k < flagged, a) {
                    (true, true) => c.tp += wk,
                    (true, false) => c.fp += wk,
                    (false, true) => c.fn_ += wk,
                    (false, false) => c.tn += wk,
                }
            }
            let (ap, auc) = ranking(&r, |k| f64::from(w[k]), pt, nt);
            let want = (
                c.f1().unwrap_or(f64::NAN).to_bits(),
                ap.unwrap_or(f64::NAN).to_bits(),
                auc.unwrap_or(f64::NAN).to_bits(),
            );
            let got = b.replicate(&p_in, &n_in, pt, nt);
            assert_eq!(
                (got.0.to_bits(), got.1.to_bits(), got.2.to_bits()),
                want,
                "case {case}: n {n}, flagged {flagged}"
            );
        }
    }

    /// REFERENCES.md section 11 (a): deterministic invariants of the bootstrap.
    #[test]
    fn bootstrap_is_deterministic_and_bounded() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let n = 300;
        let y: Vec<bool> = (0..n).map(|i| i % 10 == 0).collect();
        let s: Vec<f64> = (0..n)
            .map(|i| (rng.next_u32() % 1000) as f64 / 100.0 + if y[i] { 3.0 } else { 0.0 })
            .collect();
        let plan = BootstrapPlan {
            replicates: 400,
            seed: 9,
        };
        let a = bootstrap(&s, &y, 8.0, plan, 0.95);
        let b = bootstrap(&s, &y, 8.0, plan, 0.95);
        assert_eq!(a, b);
        // The same bits on one thread as on all of them.
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap();
        let c = pool.install(|| bootstrap(&s, &y, 8.0, plan, 0.95));
        assert_eq!(a, c);
        let auc = a.roc_auc.unwrap();
        assert!(0.0 <= auc.low && auc.low <= auc.high && auc.high <= 1.0);
        // Constant scores: AUC is 0.5 in every replicate.
        let flat = bootstrap(&vec![1.0; n], &y, 0.5, plan, 0.95)
            .roc_auc
            .unwrap();
        assert_eq!((flat.low, flat.high), (0.5, 0.5));
        // Perfect separation: [1, 1].
        let sep: Vec<f64> = y.iter().map(|&a| if a { 2.0 } else { 1.0 }).collect();
        let perfect = bootstrap(&sep, &y, 1.5, plan, 0.95);
        assert_eq!(perfect.roc_auc.map(|i| (i.low, i.high)), Some((1.0, 1.0)));
        assert_eq!(
            perfect.average_precision.map(|i| (i.low, i.high)),
            Some((1.0, 1.0))
        );
    }

    #[test]
    fn exact_fraction_order() {
        use std::cmp::Ordering::*;
        assert_eq!(cmp_fraction((10, 16), (12, 19)), Less);
        assert_eq!(cmp_fraction((1, 2), (2, 4)), Equal);
        assert_eq!(cmp_fraction((0, 0), (0, 5)), Equal);
    }
}
