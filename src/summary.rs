//! Evaluation summaries: everything the threshold search, the metrics, the
//! bootstrap and the figures need from one split's scores and labels, in a
//! size that grows with the anomalies, not with the rows.
//!
//! The cut points are the distinct anomaly scores plus any value fixed in
//! advance (a fixed τ, or the validation τ on the test split), in descending
//! `f64::total_cmp` order. The summary keeps, per cut point, the anomalies
//! scoring exactly that value and the normal rows tied with it; and per gap
//! between consecutive cut points (plus above the first and below the last)
//! the number of normal rows strictly inside it with their lowest and highest
//! score. It is built in one pass over the rows (in parallel blocks whose
//! summaries are merged), and two summaries of disjoint rows with the same cut
//! points merge into the summary of their union ([`Summary::merge`]).
//!
//! Every statistic the run reports depends on the rows only through these
//! counts: a normal row inside a gap is on the same side of every cut point
//! as the other normal rows of that gap, and nothing reported compares two
//! normal rows with each other. The τ midpoint needs the next lower score,
//! which may be a normal row's: that is the highest score of the gap below.

use rayon::prelude::*;

use crate::decision::Confusion;

/// The normal rows strictly between two consecutive cut points.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Gap {
    /// How many normal rows.
    pub count: u64,
    /// Their lowest score (meaningless when `count` is 0).
    pub lowest: f64,
    /// Their highest score (meaningless when `count` is 0).
    pub highest: f64,
}

impl Gap {
    const EMPTY: Gap = Gap {
        count: 0,
        lowest: f64::NAN,
        highest: f64::NAN,
    };

    fn add(&mut self, s: f64) {
        if self.count == 0 {
            self.lowest = s;
            self.highest = s;
        } else {
            if s.total_cmp(&self.lowest).is_lt() {
                self.lowest = s;
            }
            if s.total_cmp(&self.highest).is_gt() {
                self.highest = s;
            }
        }
        self.count += 1;
    }

    fn merge(&mut self, o: &Gap) {
        if o.count == 0 {
            return;
        }
        if self.count == 0 {
            *self = *o;
            return;
        }
        if o.lowest.total_cmp(&self.lowest).is_lt() {
            self.lowest = o.lowest;
        }
        if o.highest.total_cmp(&self.highest).is_gt() {
            self.highest = o.highest;
        }
        self.count += o.count;
    }

    /// Same rows: counts equal, and the extremes equal to the bit when any.
    fn same(&self, o: &Gap) -> bool {
        self.count == o.count
            && (self.count == 0
                || (self.lowest.to_bits() == o.lowest.to_bits()
                    && self.highest.to_bits() == o.highest.to_bits()))
    }
}

/// One row of an engine's counts for a summary: (interval code,
/// is an anomaly, rows, lowest score, highest score), the input of
/// [`Summary::from_counts`].
pub type CodeCount = (i64, bool, u64, f64, f64);

/// The evaluation summary of one split's scores and labels (module docs).
#[derive(Debug, Clone)]
pub struct Summary {
    /// The cut points, distinct, from high to low in `total_cmp` order.
    pub(crate) values: Vec<f64>,
    /// Per cut point: anomalies scoring exactly that value.
    pub(crate) pos: Vec<u64>,
    /// Per cut point: normal rows scoring exactly that value.
    pub(crate) tied: Vec<u64>,
    /// `values.len() + 1` gaps: gap `j` holds the normal rows strictly below
    /// cut point `j − 1` and strictly above cut point `j`.
    pub(crate) gaps: Vec<Gap>,
}

impl PartialEq for Summary {
    fn eq(&self, o: &Summary) -> bool {
        self.values.len() == o.values.len()
            && self
                .values
                .iter()
                .zip(&o.values)
                .all(|(a, b)| a.to_bits() == b.to_bits())
            && self.pos == o.pos
            && self.tied == o.tied
            && self.gaps.len() == o.gaps.len()
            && self.gaps.iter().zip(&o.gaps).all(|(a, b)| a.same(b))
    }
}

/// Rows per block of the parallel pass.
const BLOCK: usize = 1 << 15;

/// A key whose unsigned order is `f64::total_cmp`'s order, reversed (so the
/// cut points, from high to low, have increasing keys).
fn key(v: f64) -> u64 {
    let b = v.to_bits();
    !(b ^ ((((b as i64) >> 63) as u64) | (1 << 63)))
}

/// A fixed cut point as a threshold: −0 becomes +0, which flags the same
/// rows under `s > τ` and sorts with the rows that `s > τ` leaves unflagged.
fn threshold_point(v: f64) -> f64 {
    if v == 0.0 {
        0.0
    } else {
        v
    }
}

impl Summary {
    /// The summary of `scores` (no NaN) against `is_anomaly`, with the
    /// distinct anomaly scores and `extra` (finite values) as cut points.
    pub fn new(scores: &[f64], is_anomaly: &[bool], extra: &[f64]) -> Self {
        debug_assert_eq!(scores.len(), is_anomaly.len());
        let mut values: Vec<f64> = scores
            .iter()
            .zip(is_anomaly)
            .filter(|&(_, &a)| a)
            .map(|(&s, _)| s)
            .chain(extra.iter().map(|&v| threshold_point(v)))
            .collect();
        values.sort_unstable_by_key(|&v| key(v));
        values.dedup_by(|a, b| a.to_bits() == b.to_bits());
        Summary::with_cut_points(scores, is_anomaly, values)
    }

    /// The summary of these rows on exactly the cut points `values` (from
    /// high to low, distinct, no NaN; they need not be these rows' anomaly
    /// scores): the form in which blocks of one split are summarised apart
    /// and merged. An anomaly whose score is not a cut point is a bug of the
    /// caller and is counted in the gap, not lost (and [`Summary::merge`]
    /// keeps it that way); [`Summary::new`] always includes them.
    pub fn with_cut_points(scores: &[f64], is_anomaly: &[bool], values: Vec<f64>) -> Self {
        let keys: Vec<u64> = values.iter().map(|&v| key(v)).collect();
        debug_assert!(keys.windows(2).all(|w| w[0] < w[1]));
        let m = values.len();
        let empty = || Summary {
            values: Vec::new(),
            pos: vec![0; m],
            tied: vec![0; m],
            gaps: vec![Gap::EMPTY; m + 1],
        };
        let mut s = scores
            .par_chunks(BLOCK)
            .zip(is_anomaly.par_chunks(BLOCK))
            .map(|(sc, an)| {
                let mut part = empty();
                for (&v, &a) in sc.iter().zip(an) {
                    let kv = key(v);
                    let j = keys.partition_point(|&k| k < kv);
                    let on_cut = j < m && keys[j] == kv;
                    match (on_cut, a) {
                        (true, true) => part.pos[j] += 1,
                        (true, false) => part.tied[j] += 1,
                        (false, _) => part.gaps[j].add(v),
                    }
                }
                part
            })
            .reduce(empty, |mut a, b| {
                a.add_counts(&b);
                a
            });
        s.values = values;
        s
    }

    /// The summary on the cut points `values` (from high to low, distinct)
    /// of rows counted elsewhere: per (code, is_anomaly), the rows, their
    /// lowest and their highest score, where code `2j + 1` is cut point `j`
    /// and `2j` the gap above it (an engine's `GROUP BY`). `None` for a
    /// code beyond the cut points. Rows on a cut point count as anomalies or
    /// tied normal rows, rows in a gap in its count and extremes, as
    /// [`Summary::with_cut_points`] counts them.
    pub fn from_counts(values: Vec<f64>, counts: &[CodeCount]) -> Option<Self> {
        let m = values.len();
        let mut s = Summary {
            values,
            pos: vec![0; m],
            tied: vec![0; m],
            gaps: vec![Gap::EMPTY; m + 1],
        };
        for &(code, anomaly, n, lowest, highest) in counts {
            let j = usize::try_from(code / 2).ok()?;
            if code % 2 == 1 {
                let slot = if anomaly {
                    s.pos.get_mut(j)?
                } else {
                    s.tied.get_mut(j)?
                };
                *slot += n;
            } else {
                s.gaps.get_mut(j)?.merge(&Gap {
                    count: n,
                    lowest,
                    highest,
                });
            }
        }
        Some(s)
    }

    /// Where a score falls: the index of its cut point and `true`, or of
    /// the gap holding it and `false`.
    #[cfg(test)]
    pub(crate) fn locate(&self, v: f64) -> (usize, bool) {
        let j = self.values.partition_point(|&c| key(c) < key(v));
        (j, j < self.values.len() && key(self.values[j]) == key(v))
    }

    fn add_counts(&mut self, o: &Summary) {
        for (a, b) in self.pos.iter_mut().zip(&o.pos) {
            *a += b;
        }
        for (a, b) in self.tied.iter_mut().zip(&o.tied) {
            *a += b;
        }
        for (a, b) in self.gaps.iter_mut().zip(&o.gaps) {
            a.merge(b);
        }
    }

    /// The summary of the union of two disjoint row sets summarised on the
    /// same cut points; `None` when the cut points differ.
    pub fn merge(&self, other: &Summary) -> Option<Summary> {
        let same = self.values.len() == other.values.len()
            && self
                .values
                .iter()
                .zip(&other.values)
                .all(|(a, b)| a.to_bits() == b.to_bits());
        if !same {
            return None;
        }
        let mut s = self.clone();
        s.add_counts(other);
        Some(s)
    }

    /// The cut points, from high to low.
    pub fn cut_points(&self) -> &[f64] {
        &self.values
    }

    /// Anomalies summarised.
    pub fn positives(&self) -> u64 {
        self.pos.iter().sum()
    }

    /// Normal rows summarised.
    pub fn negatives(&self) -> u64 {
        self.tied.iter().sum::<u64>() + self.gaps.iter().map(|g| g.count).sum::<u64>()
    }

    /// Rows summarised.
    pub fn rows(&self) -> u64 {
        self.positives() + self.negatives()
    }

    /// For every cut point `j`, the highest score of any row below it (in a
    /// lower gap or on a lower cut point), if any; computed from the bottom.
    pub(crate) fn next_lower(&self) -> Vec<Option<f64>> {
        let m = self.values.len();
        let mut out = vec![None; m];
        let mut below: Option<f64> = None;
        for j in (0..m).rev() {
            let g = &self.gaps[j + 1];
            if g.count > 0 {
                below = Some(g.highest);
            }
            out[j] = below;
            if self.pos[j] + self.tied[j] > 0 {
                below = Some(self.values[j]);
            }
        }
        out
    }

    /// The highest score of any row, if any.
    pub(crate) fn highest(&self) -> Option<f64> {
        for j in 0..self.values.len() {
            if self.gaps[j].count > 0 {
                return Some(self.gaps[j].highest);
            }
            if self.pos[j] + self.tied[j] > 0 {
                return Some(self.values[j]);
            }
        }
        self.gaps.last().filter(|g| g.count > 0).map(|g| g.highest)
    }

    /// How the decision "flag iff s > τ" splits the summary: the number of
    /// cut points above τ, and whether the gap just below them is flagged.
    /// `None` when τ falls strictly inside that gap's normal scores, where
    /// the summary cannot count (τ is then not one of its cut points).
    pub(crate) fn split_at(&self, tau: f64) -> Option<(usize, bool)> {
        let t = crate::decision::Threshold(tau);
        let k = self.values.partition_point(|&v| t.flags(v));
        let g = &self.gaps[k];
        // A NaN τ (the row-level search's τ for "flag everything" when the
        // lowest score is −∞) flags nothing under s > τ, as row by row.
        if g.count == 0 || !t.flags(g.highest) || tau.is_nan() {
            Some((k, false))
        } else if t.flags(g.lowest) {
            Some((k, true))
        } else {
            None
        }
    }

    /// The confusion matrix of "flag iff s > τ", or `None` when τ splits a
    /// gap's normal rows (add τ as a cut point to count there).
    pub fn confusion_at(&self, tau: f64) -> Option<Confusion> {
        let (k, gap_flagged) = self.split_at(tau)?;
        let tp: u64 = self.pos[..k].iter().sum();
        let fp: u64 = self.tied[..k].iter().sum::<u64>()
            + self.gaps[..k].iter().map(|g| g.count).sum::<u64>()
            + if gap_flagged { self.gaps[k].count } else { 0 };
        Some(Confusion {
            tp,
            fp,
            fn_: self.positives() - tp,
            tn: self.negatives() - fp,
        })
    }

    /// Average precision (scikit-learn's step definition) and ROC AUC (ties
    /// one half): [`crate::metrics::average_precision`] and
    /// [`crate::metrics::roc_auc`] to the bit.
    ///
    /// The row-level walk visits every distinct score from high to low; a
    /// group without an anomaly adds nothing to either sum and only moves the
    /// count of normal rows above. Its running counts are whole numbers,
    /// exact in binary64, so adding a gap's count at once gives the same
    /// doubles as adding its groups one by one, and every group with an
    /// anomaly (a cut point) sees the same operands in the same order.
    pub fn ap_auc(&self) -> (Option<f64>, Option<f64>) {
        let counts = self.pos.iter().zip(&self.tied).map(|(&p, &t)| (p, t));
        let gaps = self.gaps.iter().map(|g| g.count);
        let (p, n) = (self.positives() as f64, self.negatives() as f64);
        ranking_walk(counts, gaps, p, n)
    }
}

/// The points where the precision-recall, ROC and objective curves bend,
/// from "flag nothing" to "flag everything": after each run of normal rows
/// inside a gap, and after each cut point holding rows, with the τ a search
/// would give there (the midpoint to the next lower score).
///
/// At most two points per cut point, whatever the rows. Inside a gap only
/// FP moves, one normal row at a time: the row-level ROC points there lie on
/// one horizontal segment and the precision-recall points on one vertical
/// segment, so the polyline through these points is the row-level curve
/// exactly. The objective against ln ε is exact at these points and drawn
/// straight across each gap's run of normal scores.
pub fn curve(s: &Summary) -> Vec<crate::threshold::Cut> {
    use crate::threshold::{below, between, Cut};
    let (positives, negatives) = (s.positives(), s.negatives());
    let next_lower = s.next_lower();
    let m = s.values.len();
    let cut = |tp: u64, fp: u64, tau: f64| Cut {
        c: Confusion {
            tp,
            fp,
            fn_: positives - tp,
            tn: negatives - fp,
        },
        tau,
    };
    let step = |score: f64, next: Option<f64>| match next {
        Some(next) => between(score, next),
        None => below(score),
    };
    let mut out = vec![cut(0, 0, s.highest().unwrap_or(0.0))];
    let (mut tp, mut fp) = (0u64, 0u64);
    for (j, g) in s.gaps.iter().enumerate() {
        if g.count > 0 {
            fp += g.count;
            let next = match j < m && s.pos[j] + s.tied[j] > 0 {
                true => Some(s.values[j]),
                false if j < m => next_lower[j],
                false => None,
            };
            out.push(cut(tp, fp, step(g.lowest, next)));
        }
        if j < m && s.pos[j] + s.tied[j] > 0 {
            tp += s.pos[j];
            fp += s.tied[j];
            out.push(cut(tp, fp, step(s.values[j], next_lower[j])));
        }
    }
    out
}

/// The walk of [`Summary::ap_auc`] over (anomalies, tied normals) per cut
/// point and normals per gap, with class totals `p_total`, `n_total`: shared
/// with the bootstrap, which walks drawn counts the same way
/// ([`RankingWalk`]).
pub(crate) fn ranking_walk(
    at_cuts: impl Iterator<Item = (u64, u64)>,
    mut gaps: impl Iterator<Item = u64>,
    p_total: f64,
    n_total: f64,
) -> (Option<f64>, Option<f64>) {
    let mut walk = RankingWalk::new(p_total, n_total);
    for (p, n) in at_cuts {
        walk.gap(gaps.next().unwrap_or(0));
        walk.cut(p, n);
    }
    walk.finish()
}

/// Average precision and ROC AUC accumulated down a ranking, cut point by
/// cut point from the highest score: the one place of that arithmetic, for
/// the summary and for every bootstrap replicate.
pub(crate) struct RankingWalk {
    ap: f64,
    u: f64,
    pos_above: u64,
    neg_above: u64,
    p_total: f64,
    n_total: f64,
}

impl RankingWalk {
    /// A walk over a ranking with these class totals.
    pub(crate) fn new(p_total: f64, n_total: f64) -> Self {
        RankingWalk {
            ap: 0.0,
            u: 0.0,
            pos_above: 0,
            neg_above: 0,
            p_total,
            n_total,
        }
    }

    /// `n` normal rows between the last cut point and the next.
    pub(crate) fn gap(&mut self, n: u64) {
        self.neg_above += n;
    }

    /// A cut point with `p` anomalies and `n` normal rows tied with them.
    pub(crate) fn cut(&mut self, p: u64, n: u64) {
        if p > 0 {
            let (pf, nf) = (p as f64, n as f64);
            let (tp, fp) = ((self.pos_above + p) as f64, (self.neg_above + n) as f64);
            self.ap += (pf / self.p_total) * (tp / (tp + fp));
            // Anomalies here beat the normal rows below; ties count one half.
            self.u += pf * (self.n_total - self.neg_above as f64 - nf) + 0.5 * pf * nf;
        }
        self.pos_above += p;
        self.neg_above += n;
    }

    /// (AP, AUC); `None` where a class has no rows.
    pub(crate) fn finish(self) -> (Option<f64>, Option<f64>) {
        let ap = (self.p_total > 0.0).then_some(self.ap);
        let auc = (self.p_total > 0.0 && self.n_total > 0.0)
            .then(|| self.u / (self.p_total * self.n_total));
        (ap, auc)
    }
}

#[cfg(test)]
mod tests {
    use super::curve;
    use super::*;
    use crate::metrics::{average_precision, roc_auc, Metrics};
    use crate::spec::BootstrapPlan;
    use crate::spec::ThresholdPolicy;
    use crate::threshold::{choose, choose_summary, cuts, cuts_summary};
    use proptest::prelude::*;
    use rand_chacha::rand_core::{Rng, SeedableRng};

    /// Scores with many ties, signed zeros and +∞, and at least one anomaly
    /// and one normal row (as the protocol guarantees). No −∞: "flag every
    /// row" has no τ below it (the row-level search's τ is then NaN).
    fn random_case(rng: &mut rand_chacha::ChaCha8Rng) -> (Vec<f64>, Vec<bool>) {
        let n = 2 + (rng.next_u32() % 300) as usize;
        let levels = 1 + rng.next_u32() % 40;
        let share = 2 + rng.next_u32() % 8;
        let mut y: Vec<bool> = (0..n)
            .map(|_| rng.next_u32().is_multiple_of(share))
            .collect();
        y[0] = true;
        y[n - 1] = false;
        let specials = [0.0, -0.0, f64::INFINITY, -1e300, 1e-300, -1e-300];
        let s = (0..n)
            .map(|i| match rng.next_u32() % 20 {
                0 => specials[(rng.next_u32() % 6) as usize],
                1 => (f64::from(rng.next_u32()) - 2e9) * 1e-7,
                _ => {
                    f64::from(rng.next_u32() % levels) / 4.0 - 3.0
                        + if y[i] {
                            f64::from(rng.next_u32() % 3)
                        } else {
                            0.0
                        }
                }
            })
            .collect();
        (s, y)
    }

    fn policies() -> Vec<ThresholdPolicy> {
        vec![
            ThresholdPolicy::MaxF1,
            ThresholdPolicy::MaxFBeta { beta: 2.0 },
            ThresholdPolicy::MaxFBeta { beta: 0.5 },
            ThresholdPolicy::AlarmBudget {
                max_false_positive_rate: 0.1,
            },
            ThresholdPolicy::AlarmBudget {
                max_false_positive_rate: 0.0,
            },
            ThresholdPolicy::RecallTarget { min_recall: 0.6 },
            ThresholdPolicy::RecallTarget { min_recall: 1.0 },
            ThresholdPolicy::PrecisionTarget { min_precision: 0.7 },
            ThresholdPolicy::PrecisionTarget { min_precision: 0.0 },
            ThresholdPolicy::PrecisionTarget { min_precision: 1.0 },
            ThresholdPolicy::MinCost {
                missed_anomaly: 10.0,
                false_alarm: 1.0,
            },
            ThresholdPolicy::MinCost {
                missed_anomaly: 0.0,
                false_alarm: 1.0,
            },
            ThresholdPolicy::Fixed {
                tau: Some(0.25),
                ln_epsilon: None,
            },
            ThresholdPolicy::Fixed {
                tau: None,
                ln_epsilon: Some(0.0),
            },
            ThresholdPolicy::Conformal {
                max_false_positive_rate: 0.1,
            },
            ThresholdPolicy::Conformal {
                max_false_positive_rate: 0.5,
            },
        ]
    }

    fn json(m: &Metrics) -> String {
        // serde_json writes the shortest text that reads back to the same
        // double, so equal text is equal bits.
        serde_json::to_string(m).unwrap()
    }

    /// Every threshold policy's choice (τ to the bit, counts, met, note), the
    /// confusion matrix and every rate at τ, average precision, ROC AUC and
    /// the bootstrap intervals, from the summary and row by row, on 400
    /// random score sets with ties (common practice, no source: the
    /// row-level functions are the reference, checked themselves against
    /// scikit-learn and the published values in their own tests).
    #[test]
    fn every_value_equals_the_row_level_computation() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(2026);
        let boot = BootstrapPlan {
            replicates: 25,
            seed: 4,
        };
        for case in 0..400 {
            let (s, y) = random_case(&mut rng);
            let sum = Summary::new(&s, &y, &[]);
            let (ap, auc) = sum.ap_auc();
            assert_eq!(
                (ap.map(f64::to_bits), auc.map(f64::to_bits)),
                (
                    average_precision(&s, &y).map(f64::to_bits),
                    roc_auc(&s, &y).map(f64::to_bits)
                ),
                "case {case}"
            );
            // The summary's cuts are cuts of the full search, in its order.
            let all = cuts(&s, &y);
            let mut at = 0;
            for c in cuts_summary(&sum) {
                while at < all.len()
                    && !(all[at].c == c.c && all[at].tau.to_bits() == c.tau.to_bits())
                {
                    at += 1;
                }
                assert!(
                    at < all.len(),
                    "case {case}: cut {c:?} not in the full search"
                );
            }
            for p in policies() {
                let want = choose(p, &s, &y);
                let got = choose_summary(p, &s, &y, &sum);
                assert_eq!(
                    (got.tau.to_bits(), got.confusion, got.met, &got.note),
                    (want.tau.to_bits(), want.confusion, want.met, &want.note),
                    "case {case}: {p:?}"
                );
                let beta = match p {
                    ThresholdPolicy::MaxFBeta { beta } => Some(beta),
                    _ => Some(1.5),
                };
                let reference = json(&Metrics::of(&s, &y, want.tau, beta, boot));
                // With τ as a cut point (the test split), and for a searched
                // τ on the summary without it (the validation split).
                let with_tau = Summary::new(&s, &y, &[want.tau]);
                let m = Metrics::of_summary(&with_tau, want.tau, beta, boot)
                    .unwrap_or_else(|| panic!("case {case}: {p:?} τ {}", want.tau));
                assert_eq!(json(&m), reference, "case {case}: {p:?}");
                // The bootstrap's bins, and so its draws, depend on the cut
                // points (a τ inside a gap splits it in two), not its law:
                // compared here without it.
                // A τ fixed in advance (fixed, conformal) is not a cut of
                // the summary without it: the protocol adds it first.
                if !matches!(
                    p,
                    ThresholdPolicy::Fixed { .. } | ThresholdPolicy::Conformal { .. }
                ) {
                    let off = BootstrapPlan {
                        replicates: 0,
                        ..boot
                    };
                    let m = Metrics::of_summary(&sum, want.tau, beta, off).unwrap();
                    let reference = json(&Metrics::of(&s, &y, want.tau, beta, off));
                    assert_eq!(json(&m), reference, "case {case}: {p:?}");
                }
            }
            assert_eq!(
                sum.confusion_at(f64::NAN),
                Some(crate::metrics::Confusion::at(
                    &s,
                    &y,
                    crate::metrics::Threshold(f64::NAN)
                )),
                "case {case}: a NaN τ flags nothing"
            );
            // Any τ, as a cut point: the counts of "flag iff s > τ".
            for _ in 0..5 {
                let tau = match rng.next_u32() % 3 {
                    0 => s[(rng.next_u32() as usize) % s.len()],
                    1 => -0.0,
                    _ => f64::from(rng.next_u32() % 60) / 8.0 - 4.0,
                };
                let with_tau = Summary::new(&s, &y, &[tau]);
                assert_eq!(
                    with_tau.confusion_at(tau),
                    Some(crate::metrics::Confusion::at(
                        &s,
                        &y,
                        crate::metrics::Threshold(tau)
                    )),
                    "case {case}: τ {tau}"
                );
            }
        }
    }

    /// Published check values through the summary: REFERENCES.md section 4
    /// (scikit-learn 1.9.1 on tied scores: AP = 31/48, AUC = 37/48; max F1
    /// at the cut below 0.7, TP 3, FP 1, FN 1, TN 5, τ = 0.55) and section 5
    /// (TP 8, FP 3, FN 2, TN 1987: precision 8/11, recall 0.8, F1 16/21,
    /// F2 40/51, specificity 1987/1990, balanced accuracy 0.899246231155779,
    /// MCC 0.7615240523537039).
    #[test]
    fn published_values_through_the_summary() {
        let y = [
            false, false, true, true, false, true, false, false, true, false,
        ];
        let s = [0.1, 0.4, 0.35, 0.8, 0.4, 0.7, 0.8, 0.35, 0.8, 0.05];
        let sum = Summary::new(&s, &y, &[]);
        let (ap, auc) = sum.ap_auc();
        assert!((ap.unwrap() - 0.6458333333333333).abs() < 1e-12);
        assert!((auc.unwrap() - 0.7708333333333334).abs() < 1e-12);
        let c = choose_summary(ThresholdPolicy::MaxF1, &s, &y, &sum);
        assert_eq!(c.tau, 0.55);
        assert_eq!(
            (
                c.confusion.tp,
                c.confusion.fp,
                c.confusion.fn_,
                c.confusion.tn
            ),
            (3, 1, 1, 5)
        );

        // Section 5's matrix: 8 anomalies and 3 normal rows above τ = 0.
        let mut s = vec![];
        let mut y = vec![];
        for (score, anomaly, count) in [(2.0, true, 8), (1.0, false, 3), (-1.0, true, 2)] {
            s.extend(std::iter::repeat_n(score, count));
            y.extend(std::iter::repeat_n(anomaly, count));
        }
        s.extend(std::iter::repeat_n(-2.0, 1987));
        y.extend(std::iter::repeat_n(false, 1987));
        let off = BootstrapPlan {
            replicates: 0,
            seed: 0,
        };
        let m = Metrics::of_summary(&Summary::new(&s, &y, &[0.0]), 0.0, Some(2.0), off).unwrap();
        let close = |a: Option<f64>, b: f64| assert!((a.unwrap() - b).abs() <= 1e-12, "{a:?} {b}");
        close(m.precision, 0.7272727272727273);
        close(m.recall, 0.8);
        close(m.f1, 0.7619047619047619);
        close(m.f_beta, 0.7843137254901961);
        close(m.specificity, 0.9984924623115577);
        close(m.false_positive_rate, 3.0 / 1990.0);
        close(m.balanced_accuracy, 0.899246231155779);
        close(m.mcc, 0.7615240523537039);
    }

    /// One big split summarised in parallel blocks equals the summary made
    /// row by row in one sequential loop (common practice, no source).
    #[test]
    fn parallel_blocks_equal_one_sequential_pass() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(8);
        let n = 3 * BLOCK + 123;
        let y: Vec<bool> = (0..n).map(|_| rng.next_u32() % 200 == 0).collect();
        let s: Vec<f64> = (0..n)
            .map(|i| f64::from(rng.next_u32() % 5000) / 100.0 + if y[i] { 5.0 } else { 0.0 })
            .collect();
        let sum = Summary::new(&s, &y, &[7.25]);
        let m = sum.values.len();
        let mut want = Summary {
            values: sum.values.clone(),
            pos: vec![0; m],
            tied: vec![0; m],
            gaps: vec![Gap::EMPTY; m + 1],
        };
        for (&v, &a) in s.iter().zip(&y) {
            match (sum.locate(v), a) {
                ((j, true), true) => want.pos[j] += 1,
                ((j, true), false) => want.tied[j] += 1,
                ((j, false), _) => want.gaps[j].add(v),
            }
        }
        assert_eq!(sum, want);
        assert_eq!(sum.rows(), n as u64);
    }

    /// The curve's points are cuts of the full search, in its order, and
    /// every cut of the full search they leave out lies on the segment
    /// between its neighbours among them, at the same TP (so on one
    /// horizontal ROC and one vertical precision-recall segment).
    #[test]
    fn curve_points_are_the_bends_of_the_row_level_curve() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(77);
        for case in 0..300 {
            let (s, y) = random_case(&mut rng);
            let sum = Summary::new(&s, &y, &[]);
            let all = cuts(&s, &y);
            let pts = curve(&sum);
            assert!(pts.len() <= 2 * sum.values.len() + 2);
            let mut at = 0;
            let mut last_kept = None;
            for p in &pts {
                while !(all[at].c == p.c && all[at].tau.to_bits() == p.tau.to_bits()) {
                    let prev: &crate::threshold::Cut = last_kept.expect("the first point is kept");
                    assert_eq!(all[at].c.tp, prev.c.tp, "case {case}");
                    assert_eq!(all[at].c.tp, p.c.tp, "case {case}");
                    at += 1;
                }
                last_kept = Some(&all[at]);
                at += 1;
            }
            assert_eq!(at, all.len(), "case {case}: the last point flags every row");
        }
    }

    proptest! {
        #![proptest_config(ProptestConfig { cases: 128, ..ProptestConfig::default() })]

        /// Two disjoint row sets summarised on the same cut points merge into
        /// the summary of their union, whichever way round; summaries on
        /// different cut points do not merge.
        #[test]
        fn merge_of_disjoint_rows_is_the_summary_of_the_union(
            rows in prop::collection::vec((0u32..40, any::<bool>(), any::<bool>()), 1..300),
            extra in prop::collection::vec(0u32..40, 0..3),
        ) {
            let s: Vec<f64> = rows.iter().map(|r| f64::from(r.0) / 4.0 - 2.0).collect();
            let y: Vec<bool> = rows.iter().map(|r| r.1).collect();
            let extra: Vec<f64> = extra.iter().map(|&e| f64::from(e) / 4.0 - 1.9).collect();
            let whole = Summary::new(&s, &y, &extra);
            let (mut sa, mut ya, mut sb, mut yb) = (vec![], vec![], vec![], vec![]);
            for (i, r) in rows.iter().enumerate() {
                if r.2 {
                    sa.push(s[i]);
                    ya.push(y[i]);
                } else {
                    sb.push(s[i]);
                    yb.push(y[i]);
                }
            }
            let a = Summary::with_cut_points(&sa, &ya, whole.values.clone());
            let b = Summary::with_cut_points(&sb, &yb, whole.values.clone());
            prop_assert_eq!(a.merge(&b).unwrap(), whole.clone());
            prop_assert_eq!(b.merge(&a).unwrap(), whole.clone());
            let other = Summary::new(&sa, &ya, &[1e9]);
            prop_assert!(other.merge(&b).is_none());
        }
    }
}
