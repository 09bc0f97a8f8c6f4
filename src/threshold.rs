//! Threshold policies. The only input is validation scores and labels: the
//! test split never reaches this module.
//!
//! `max-f1` is found exactly: one sort of the validation scores, then a walk
//! over every distinct cut point, O(n log n). Among cut points with the same
//! F1 (compared as exact fractions) the one that flags the fewest validation
//! rows wins, i.e. the highest τ. The chosen τ is the midpoint between the
//! lowest flagged validation score and the next lower distinct one, so that
//! small shifts in a score do not flip a validation decision; when every
//! validation row is flagged, τ is the largest double below the lowest score.

use crate::metrics::{cmp_fraction, Confusion};
use crate::spec::ThresholdPolicy;

/// A chosen operating point.
#[derive(Debug, Clone, Copy)]
pub struct Choice {
    /// Flag iff s(x) > τ.
    pub tau: f64,
    /// The validation confusion matrix at τ.
    pub confusion: Confusion,
}

impl Choice {
    /// ln ε = −τ: the log-density below which a row is flagged.
    pub fn ln_epsilon(&self) -> f64 {
        -self.tau
    }
}

/// Chooses τ on validation by the policy.
pub fn choose(policy: ThresholdPolicy, scores: &[f64], is_anomaly: &[bool]) -> Choice {
    match policy {
        ThresholdPolicy::MaxF1 => max_f1(scores, is_anomaly),
    }
}

/// The largest double below `x` (x finite).
fn below(x: f64) -> f64 {
    if x > 0.0 {
        f64::from_bits(x.to_bits() - 1)
    } else if x == 0.0 {
        -f64::from_bits(1)
    } else {
        f64::from_bits(x.to_bits() + 1)
    }
}

/// A τ strictly between `low` and `high` (low < high) when one exists, else
/// `low`: rows scoring `high` are flagged and rows scoring `low` are not.
fn between(high: f64, low: f64) -> f64 {
    let mid = low / 2.0 + high / 2.0;
    if mid > low && mid < high {
        mid
    } else {
        low
    }
}

/// The τ that maximises F1 on validation (see the module docs for ties).
pub fn max_f1(scores: &[f64], is_anomaly: &[bool]) -> Choice {
    let mut order: Vec<(f64, bool)> = scores
        .iter()
        .copied()
        .zip(is_anomaly.iter().copied())
        .collect();
    order.sort_by(|a, b| b.0.total_cmp(&a.0));
    let positives = is_anomaly.iter().filter(|&&a| a).count() as u64;
    let negatives = is_anomaly.len() as u64 - positives;

    let (mut tp, mut fp) = (0u64, 0u64);
    // Start from "flag nothing".
    let mut best = (
        Confusion {
            tp: 0,
            fp: 0,
            fn_: positives,
            tn: negatives,
        },
        None::<usize>,
    );
    let mut i = 0;
    while i < order.len() {
        let s = order[i].0;
        while i < order.len() && order[i].0.total_cmp(&s).is_eq() {
            if order[i].1 {
                tp += 1;
            } else {
                fp += 1;
            }
            i += 1;
        }
        let c = Confusion {
            tp,
            fp,
            fn_: positives - tp,
            tn: negatives - fp,
        };
        if cmp_fraction(c.f1_fraction(), best.0.f1_fraction()).is_gt() {
            best = (c, Some(i));
        }
    }
    let tau = match best.1 {
        // Nothing flagged: τ at the top score flags nothing.
        None => order.first().map_or(0.0, |o| o.0),
        Some(end) => {
            let lowest_flagged = order[end - 1].0;
            match order.get(end) {
                Some(next) => between(lowest_flagged, next.0),
                None => below(lowest_flagged),
            }
        }
    };
    Choice {
        tau,
        confusion: best.0,
    }
}

/// The validation F1 of every candidate cut, by brute force (test helper).
#[cfg(test)]
fn brute_force_best_f1(scores: &[f64], is_anomaly: &[bool]) -> (u64, u64) {
    let mut best = (0, 1);
    for &t in scores {
        let c = Confusion::at(scores, is_anomaly, below(t));
        if cmp_fraction(c.f1_fraction(), best).is_gt() {
            best = c.f1_fraction();
        }
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand_chacha::rand_core::{Rng, SeedableRng};

    #[test]
    fn separable_scores_pick_the_gap_midpoint() {
        let s = [0.1, 0.2, 0.3, 5.0, 6.0];
        let y = [false, false, false, true, true];
        let c = max_f1(&s, &y);
        assert_eq!(c.tau, 2.65);
        assert_eq!(
            c.confusion,
            Confusion {
                tp: 2,
                fp: 0,
                fn_: 0,
                tn: 3
            }
        );
        assert_eq!(c.ln_epsilon(), -2.65);
    }

    /// The REFERENCES.md section 4 data with its tied scores: the cut at 0.7
    /// gives P = 3/4, R = 3/4, F1 = 3/4, the maximum (hand-derived from the
    /// precision-recall curve listed there).
    #[test]
    fn tied_scores_are_cut_as_groups() {
        let y = [
            false, false, true, true, false, true, false, false, true, false,
        ];
        let s = [0.1, 0.4, 0.35, 0.8, 0.4, 0.7, 0.8, 0.35, 0.8, 0.05];
        let c = max_f1(&s, &y);
        assert_eq!(
            c.confusion,
            Confusion {
                tp: 3,
                fp: 1,
                fn_: 1,
                tn: 5
            }
        );
        assert_eq!(c.tau, 0.55);
        assert_eq!(Confusion::at(&s, &y, c.tau), c.confusion);
    }

    #[test]
    fn equal_f1_prefers_fewer_alarms() {
        // Cut after the first row: TP 1, FP 0, FN 1 → F1 2/3. Cut after all four:
        // TP 2, FP 2, FN 0 → F1 4/6 = 2/3. The higher τ wins.
        let s = [4.0, 3.0, 2.0, 1.0];
        let y = [true, false, false, true];
        let c = max_f1(&s, &y);
        assert_eq!(c.confusion.tp + c.confusion.fp, 1);
        assert_eq!(c.tau, 3.5);
    }

    #[test]
    fn exact_search_equals_brute_force_on_random_data() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        for _ in 0..200 {
            let n = 2 + (rng.next_u32() % 40) as usize;
            let s: Vec<f64> = (0..n).map(|_| (rng.next_u32() % 12) as f64 / 4.0).collect();
            let mut y: Vec<bool> = (0..n).map(|_| rng.next_u32() % 4 == 0).collect();
            y[0] = true;
            let c = max_f1(&s, &y);
            assert_eq!(
                Confusion::at(&s, &y, c.tau),
                c.confusion,
                "τ reproduces the counts"
            );
            assert!(cmp_fraction(c.confusion.f1_fraction(), brute_force_best_f1(&s, &y)).is_eq());
        }
    }

    #[test]
    fn adjacent_doubles_keep_the_decision() {
        let hi = 1.0f64;
        let lo = below(hi);
        assert_eq!(between(hi, lo), lo);
        assert!(hi > between(hi, lo) && lo <= between(hi, lo));
    }
}
