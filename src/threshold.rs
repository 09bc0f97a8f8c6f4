//! Threshold policies. The only input is validation scores and labels: the
//! test split never reaches this module.
//!
//! Every policy is an exact search: one sort of the validation scores, then a
//! walk over every distinct cut point (O(n log n)); or, in the protocol, the
//! same search over the cut points of the validation scores' evaluation
//! summary (one pass, no sort; [`cuts_summary`] says why it is the same). Cut point k flags the rows
//! whose scores are among the k highest distinct values. Among cut points that
//! are equally good under a policy the one that flags the fewest validation
//! rows wins, i.e. the highest τ. The chosen τ is the midpoint between the
//! lowest flagged validation score and the next lower distinct one, so that
//! small shifts in a score do not flip a validation decision; when every
//! validation row is flagged, τ is the largest double below the lowest score;
//! when none is, τ is the highest score.
//!
//! A policy that no cut point meets (a precision target above every
//! achievable precision) returns the closest achievable point with
//! `met = false` and a note saying so; the protocol does not select such a
//! candidate.

use crate::metrics::{cmp_fraction, Confusion, Ranked, Threshold};
use crate::spec::ThresholdPolicy;
use crate::summary::Summary;

/// A chosen operating point.
#[derive(Debug, Clone, PartialEq)]
pub struct Choice {
    /// Flag iff s(x) > τ.
    pub tau: f64,
    /// The validation confusion matrix at τ.
    pub confusion: Confusion,
    /// Whether the policy's constraint is met on validation.
    pub met: bool,
    /// Why not, with the closest achievable point.
    pub note: Option<String>,
}

impl Choice {
    /// ln ε = −τ: the log-density below which a row is flagged.
    pub fn ln_epsilon(&self) -> f64 {
        -self.tau
    }
}

/// The largest double below `x` (x finite).
pub(crate) fn below(x: f64) -> f64 {
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
pub(crate) fn between(high: f64, low: f64) -> f64 {
    let mid = low / 2.0 + high / 2.0;
    if mid > low && mid < high {
        mid
    } else {
        low
    }
}

/// One cut point: τ and the confusion matrix of flagging s(x) > τ.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Cut {
    /// The τ of this cut.
    pub tau: f64,
    /// The confusion matrix at τ.
    pub c: Confusion,
}

/// Every distinct cut point, from "flag nothing" to "flag everything".
pub fn cuts(scores: &[f64], is_anomaly: &[bool]) -> Vec<Cut> {
    cuts_ranked(&Ranked::new(scores, is_anomaly))
}

/// [`cuts`] from the scores' ranking (the same cuts, no sort; the ranking
/// holds the scores in rank order).
pub fn cuts_ranked(r: &Ranked) -> Vec<Cut> {
    let positives = r.anomalous.iter().filter(|&&a| a).count() as u64;
    let negatives = r.anomalous.len() as u64 - positives;
    let mut cuts = Vec::with_capacity(r.ends.len() + 1);
    cuts.push(Cut {
        c: Confusion {
            tp: 0,
            fp: 0,
            fn_: positives,
            tn: negatives,
        },
        tau: r.sorted.first().copied().unwrap_or(0.0),
    });
    let (mut tp, mut fp) = (0u64, 0u64);
    let mut start = 0;
    for &end in &r.ends {
        let p = r.anomalous[start..end].iter().filter(|&&a| a).count() as u64;
        tp += p;
        fp += (end - start) as u64 - p;
        let s = r.sorted[start];
        let tau = match r.sorted.get(end) {
            Some(&next) => between(s, next),
            None => below(s),
        };
        cuts.push(Cut {
            c: Confusion {
                tp,
                fp,
                fn_: positives - tp,
                tn: negatives - fp,
            },
            tau,
        });
        start = end;
    }
    cuts
}

/// The cut points a policy searches, from the split's evaluation summary:
/// "flag nothing", then the cut just below each group of tied scores that
/// holds an anomaly (flagging that group and every row above it), with the
/// same τ and counts as the corresponding cut of [`cuts_ranked`].
///
/// The cuts left out are those just below a group of normal rows only. Each
/// has the counts of the kept cut before it (the last anomaly group above it,
/// or "flag nothing") with the same TP and more FP, and each policy, given
/// at least one anomaly (the protocol refuses a split without one), is then
/// no better there, so the first best cut of the full search is a kept one:
///
/// - `max-f1`: F1 = 2TP/(2TP + FP + FN) falls as FP grows at fixed TP.
/// - `max-f-beta`: Fβ = (1 + β²)TP/((1 + β²)TP + β²FN + FP) likewise (the
///   rounded quotient of one numerator over a larger denominator is never
///   larger).
/// - `alarm-budget`: recall is fixed at fixed TP, and the false-positive rate
///   only grows, so such a cut is within budget only if the kept one is.
/// - `recall-target`: recall changes only at anomaly groups, so the first cut
///   reaching the target is "flag nothing" or the cut below an anomaly group.
/// - `precision-target`: at fixed TP, precision TP/(TP + FP) falls as FP
///   grows and recall stays, so such a cut is no better than the kept one
///   before it; a cut with TP = 0 meets no target above 0, and under a target
///   of 0 the first cut below an anomaly group meets it with a higher recall.
/// - `min-cost`: cost = c_miss·FN + c_alarm·FP with c_alarm ≥ 0 grows with FP.
/// - `fixed`: τ is set in advance; it is added to the summary as a cut point,
///   so its counts are read off the summary exactly.
/// - `conformal`: τ is a validation normal's score fixed by the level alone
///   (the ⌈(1 − A)(n + 1)⌉-th smallest), not searched; like a fixed τ it is
///   added to the summary as a cut point, so its counts are exact.
///
/// The τ of a kept cut is the midpoint between the group's score and the next
/// lower score, which is the highest score of the gap below when that gap
/// holds normal rows: the summary keeps it for that reason.
pub fn cuts_summary(s: &Summary) -> Vec<Cut> {
    let positives = s.positives();
    let negatives = s.negatives();
    let next_lower = s.next_lower();
    let mut cuts = Vec::with_capacity(s.pos.iter().filter(|&&p| p > 0).count() + 1);
    cuts.push(Cut {
        c: Confusion {
            tp: 0,
            fp: 0,
            fn_: positives,
            tn: negatives,
        },
        tau: s.highest().unwrap_or(0.0),
    });
    let (mut tp, mut fp) = (0u64, 0u64);
    for (j, &v) in s.values.iter().enumerate() {
        fp += s.gaps[j].count + s.tied[j];
        tp += s.pos[j];
        if s.pos[j] == 0 {
            continue;
        }
        let tau = match next_lower[j] {
            Some(next) => between(v, next),
            None => below(v),
        };
        cuts.push(Cut {
            c: Confusion {
                tp,
                fp,
                fn_: positives - tp,
                tn: negatives - fp,
            },
            tau,
        });
    }
    cuts
}

/// A policy's objective as a function of the confusion matrix.
pub type Objective = Box<dyn Fn(&Confusion) -> f64>;

/// What a policy optimises, as a name and a value per confusion matrix, for
/// the objective-against-ln ε plot. Policies with a constraint plot the
/// quantity they optimise under it; `fixed` optimises nothing and shows F1.
pub fn objective(policy: ThresholdPolicy) -> (String, Objective) {
    let recall = |c: &Confusion| rate(c.tp, c.tp + c.fn_);
    match policy {
        ThresholdPolicy::MaxFBeta { beta } => (
            format!("F-beta (beta = {beta})"),
            Box::new(move |c| f_beta(c, beta)),
        ),
        ThresholdPolicy::AlarmBudget { .. } | ThresholdPolicy::PrecisionTarget { .. } => {
            ("recall".into(), Box::new(recall))
        }
        ThresholdPolicy::RecallTarget { .. } | ThresholdPolicy::Conformal { .. } => (
            "false-positive rate".into(),
            Box::new(|c| rate(c.fp, c.fp + c.tn)),
        ),
        ThresholdPolicy::MinCost {
            missed_anomaly,
            false_alarm,
        } => (
            "cost".into(),
            Box::new(move |c| missed_anomaly * c.fn_ as f64 + false_alarm * c.fp as f64),
        ),
        ThresholdPolicy::MaxF1 | ThresholdPolicy::Fixed { .. } => {
            ("F1".into(), Box::new(|c| f_beta(c, 1.0)))
        }
    }
}

/// The index of the best cut under `better` (a strict "is better than"), the
/// first (highest τ) among equals.
fn best_by(cuts: &[Cut], better: impl Fn(&Confusion, &Confusion) -> bool) -> usize {
    let mut best = 0;
    for (k, cut) in cuts.iter().enumerate().skip(1) {
        if better(&cut.c, &cuts[best].c) {
            best = k;
        }
    }
    best
}

fn rate(num: u64, den: u64) -> f64 {
    if den == 0 {
        0.0
    } else {
        num as f64 / den as f64
    }
}

/// Fβ = (1 + β²) TP / ((1 + β²) TP + β² FN + FP); 0 when TP = 0.
pub fn f_beta(c: &Confusion, beta: f64) -> f64 {
    let b2 = beta * beta;
    let num = (1.0 + b2) * c.tp as f64;
    let den = num + b2 * c.fn_ as f64 + c.fp as f64;
    if c.tp == 0 {
        0.0
    } else {
        num / den
    }
}

fn chosen(cut: Cut) -> Choice {
    Choice {
        tau: cut.tau,
        confusion: cut.c,
        met: true,
        note: None,
    }
}

/// Chooses τ on validation by the policy.
pub fn choose(policy: ThresholdPolicy, scores: &[f64], is_anomaly: &[bool]) -> Choice {
    choose_from(policy, scores, is_anomaly, || cuts(scores, is_anomaly))
}

/// [`choose`] from the scores' ranking (no sort).
pub fn choose_ranked(
    policy: ThresholdPolicy,
    scores: &[f64],
    is_anomaly: &[bool],
    r: &Ranked,
) -> Choice {
    choose_from(policy, scores, is_anomaly, || cuts_ranked(r))
}

/// [`choose`] from the validation summary (no sort; the same choice, see
/// [`cuts_summary`]). A fixed τ reads the scores.
pub fn choose_summary(
    policy: ThresholdPolicy,
    scores: &[f64],
    is_anomaly: &[bool],
    s: &Summary,
) -> Choice {
    choose_from(policy, scores, is_anomaly, || cuts_summary(s))
}

/// The τ a fixed policy declares (τ, or −ln ε); `None` for any other policy.
pub fn fixed_tau(policy: ThresholdPolicy) -> Option<f64> {
    match policy {
        ThresholdPolicy::Fixed { tau, ln_epsilon } => {
            Some(tau.or(ln_epsilon.map(|l| -l)).unwrap_or(0.0))
        }
        _ => None,
    }
}

/// [`choose_summary`] from the summary alone, for the split's scores held
/// elsewhere (an engine): every policy searches the summary's cut points,
/// and a fixed τ is counted by it. `None` for the conformal policy (it reads
/// the validation normals' sorted scores) and for a fixed τ the summary
/// cannot count (make it with τ as a cut point).
pub fn choose_on_summary(policy: ThresholdPolicy, s: &Summary) -> Option<Choice> {
    match policy {
        ThresholdPolicy::Conformal { .. } => None,
        ThresholdPolicy::Fixed { .. } => {
            let tau = fixed_tau(policy)?;
            Some(chosen(Cut {
                c: s.confusion_at(tau)?,
                tau,
            }))
        }
        _ => Some(choose_from(policy, &[], &[], || cuts_summary(s))),
    }
}

/// [`choose`] with the scores' cut points made by `make_cuts`, which a fixed
/// τ does not need (it reads only the scores).
fn choose_from(
    policy: ThresholdPolicy,
    scores: &[f64],
    is_anomaly: &[bool],
    make_cuts: impl FnOnce() -> Vec<Cut>,
) -> Choice {
    let cuts = match policy {
        ThresholdPolicy::Fixed { .. } | ThresholdPolicy::Conformal { .. } => Vec::new(),
        _ => make_cuts(),
    };
    let cuts = cuts.as_slice();
    let recall = |c: &Confusion| (c.tp, c.tp + c.fn_);
    let fpr = |c: &Confusion| rate(c.fp, c.fp + c.tn);
    match policy {
        ThresholdPolicy::MaxF1 => chosen(
            cuts[best_by(cuts, |a, b| {
                cmp_fraction(a.f1_fraction(), b.f1_fraction()).is_gt()
            })],
        ),
        ThresholdPolicy::MaxFBeta { beta } => {
            chosen(cuts[best_by(cuts, |a, b| f_beta(a, beta) > f_beta(b, beta))])
        }
        ThresholdPolicy::AlarmBudget {
            max_false_positive_rate: r,
        } => {
            // "Flag nothing" has rate 0, so the budget is always met.
            let ok = |c: &Confusion| fpr(c) <= r;
            chosen(
                cuts[best_by(cuts, |a, b| {
                    ok(a) && (!ok(b) || cmp_fraction(recall(a), recall(b)).is_gt())
                })],
            )
        }
        ThresholdPolicy::RecallTarget { min_recall: r } => {
            // "Flag everything" has recall 1, so the target is always met; the
            // false-positive rate only grows along the cuts, so the first
            // feasible cut has the lowest.
            let k = cuts
                .iter()
                .position(|cut| rate(cut.c.tp, cut.c.tp + cut.c.fn_) >= r)
                .unwrap_or(cuts.len() - 1);
            chosen(cuts[k])
        }
        ThresholdPolicy::PrecisionTarget { min_precision: p } => {
            let ok = |c: &Confusion| c.tp + c.fp > 0 && rate(c.tp, c.tp + c.fp) >= p;
            let k = best_by(cuts, |a, b| {
                ok(a) && (!ok(b) || cmp_fraction(recall(a), recall(b)).is_gt())
            });
            if ok(&cuts[k].c) {
                return chosen(cuts[k]);
            }
            // Unmet: the closest point is the highest precision (then recall).
            let prec = |c: &Confusion| (c.tp, c.tp + c.fp);
            let k = best_by(cuts, |a, b| {
                cmp_fraction(prec(a), prec(b))
                    .then(cmp_fraction(recall(a), recall(b)))
                    .is_gt()
            });
            let c = cuts[k].c;
            Choice {
                tau: cuts[k].tau,
                confusion: c,
                met: false,
                note: Some(format!(
                    "precision ≥ {p} cannot be met on validation; the closest point is precision \
                     {:.4} at recall {:.4}",
                    rate(c.tp, c.tp + c.fp),
                    rate(c.tp, c.tp + c.fn_)
                )),
            }
        }
        ThresholdPolicy::MinCost {
            missed_anomaly,
            false_alarm,
        } => {
            let cost = |c: &Confusion| missed_anomaly * c.fn_ as f64 + false_alarm * c.fp as f64;
            chosen(cuts[best_by(cuts, |a, b| cost(a) < cost(b))])
        }
        ThresholdPolicy::Conformal {
            max_false_positive_rate: a,
        } => conformal(scores, is_anomaly, a),
        ThresholdPolicy::Fixed { .. } => {
            let tau = fixed_tau(policy).unwrap_or(0.0);
            chosen(Cut {
                c: Confusion::at(scores, is_anomaly, Threshold(tau)),
                tau,
            })
        }
    }
}

/// The conformal threshold at level A: τ is the ⌈(1 − A)(n + 1)⌉-th
/// smallest score of the n validation normals (taken from their sorted
/// scores directly, not from the cut points), and s > τ flags exactly the rows
/// with conformal p-value ≤ A (see [`crate::conformal::Calibration::cut`]).
/// A level below 1/(n + 1) is unmet (the protocol refuses it before this
/// point, naming the number of validation normals it would need).
pub fn conformal(scores: &[f64], is_anomaly: &[bool], a: f64) -> Choice {
    let cal = crate::conformal::Calibration::of_normals(scores, is_anomaly);
    match cal.cut(a) {
        Ok(cut) => chosen(Cut {
            c: Confusion::at(scores, is_anomaly, Threshold(cut.tau)),
            tau: cut.tau,
        }),
        Err(e) => {
            let tau = cal.sorted().last().copied().unwrap_or(0.0);
            Choice {
                tau,
                confusion: Confusion::at(scores, is_anomaly, Threshold(tau)),
                met: false,
                note: Some(format!(
                    "a false-alarm level of {a} needs at least {} validation normals, found {}",
                    e.need, e.have
                )),
            }
        }
    }
}

/// The τ that maximises F1 on validation (see the module docs for ties).
pub fn max_f1(scores: &[f64], is_anomaly: &[bool]) -> Choice {
    choose(ThresholdPolicy::MaxF1, scores, is_anomaly)
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
        assert_eq!(Confusion::at(&s, &y, Threshold(c.tau)), c.confusion);
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

    /// Brute force: every cut point of every policy, checked against a direct
    /// evaluation at every candidate τ.
    #[test]
    fn exact_search_equals_brute_force_on_random_data() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        let policies = [
            ThresholdPolicy::MaxF1,
            ThresholdPolicy::MaxFBeta { beta: 2.0 },
            ThresholdPolicy::AlarmBudget {
                max_false_positive_rate: 0.1,
            },
            ThresholdPolicy::RecallTarget { min_recall: 0.6 },
            ThresholdPolicy::MinCost {
                missed_anomaly: 10.0,
                false_alarm: 1.0,
            },
        ];
        for _ in 0..200 {
            let n = 2 + (rng.next_u32() % 40) as usize;
            let s: Vec<f64> = (0..n).map(|_| (rng.next_u32() % 12) as f64 / 4.0).collect();
            let mut y: Vec<bool> = (0..n).map(|_| rng.next_u32() % 4 == 0).collect();
            y[0] = true;
            y[n - 1] = false;
            // Candidate τ: above every score, and just below each score.
            let taus: Vec<f64> = s
                .iter()
                .map(|&v| below(v))
                .chain(std::iter::once(100.0))
                .collect();
            let all: Vec<Confusion> = taus
                .iter()
                .map(|&t| Confusion::at(&s, &y, Threshold(t)))
                .collect();
            for p in policies {
                let c = choose(p, &s, &y);
                assert_eq!(
                    Confusion::at(&s, &y, Threshold(c.tau)),
                    c.confusion,
                    "τ reproduces the counts"
                );
                let r = |c: &Confusion| rate(c.tp, c.tp + c.fn_);
                let f = |c: &Confusion| rate(c.fp, c.fp + c.tn);
                match p {
                    ThresholdPolicy::MaxF1 => assert!(all.iter().all(|a| cmp_fraction(
                        a.f1_fraction(),
                        c.confusion.f1_fraction()
                    )
                    .is_le())),
                    ThresholdPolicy::MaxFBeta { beta } => {
                        assert!(all
                            .iter()
                            .all(|a| f_beta(a, beta) <= f_beta(&c.confusion, beta)))
                    }
                    ThresholdPolicy::AlarmBudget {
                        max_false_positive_rate: b,
                    } => {
                        assert!(f(&c.confusion) <= b);
                        assert!(all
                            .iter()
                            .filter(|a| f(a) <= b)
                            .all(|a| r(a) <= r(&c.confusion)));
                    }
                    ThresholdPolicy::RecallTarget { min_recall: t } => {
                        assert!(r(&c.confusion) >= t);
                        assert!(all
                            .iter()
                            .filter(|a| r(a) >= t)
                            .all(|a| f(a) >= f(&c.confusion)));
                    }
                    ThresholdPolicy::MinCost {
                        missed_anomaly: m,
                        false_alarm: fa,
                    } => {
                        let cost = |a: &Confusion| m * a.fn_ as f64 + fa * a.fp as f64;
                        assert!(all.iter().all(|a| cost(a) >= cost(&c.confusion)));
                    }
                    _ => unreachable!(),
                }
            }
        }
    }

    /// The choice from the summary alone (an engine's) is the choice from
    /// the scores and the summary, for every policy but the conformal one;
    /// a fixed τ that is no cut point is counted once the summary holds it,
    /// as the fit stage makes it. Invented scores with ties, for this check.
    #[test]
    fn the_choice_on_the_summary_alone_is_the_choice_on_the_scores() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(29);
        let policies = [
            ThresholdPolicy::MaxF1,
            ThresholdPolicy::MaxFBeta { beta: 0.5 },
            ThresholdPolicy::AlarmBudget {
                max_false_positive_rate: 0.05,
            },
            ThresholdPolicy::RecallTarget { min_recall: 0.7 },
            ThresholdPolicy::PrecisionTarget { min_precision: 0.8 },
            ThresholdPolicy::MinCost {
                missed_anomaly: 5.0,
                false_alarm: 1.0,
            },
            ThresholdPolicy::Fixed {
                tau: Some(1.3),
                ln_epsilon: None,
            },
            ThresholdPolicy::Fixed {
                tau: None,
                ln_epsilon: Some(-1.5),
            },
        ];
        for _ in 0..300 {
            let n = 1 + (rng.next_u32() % 50) as usize;
            let s: Vec<f64> = (0..n).map(|_| (rng.next_u32() % 12) as f64 / 4.0).collect();
            let y: Vec<bool> = (0..n).map(|_| rng.next_u32() % 4 == 0).collect();
            for p in policies {
                let mut summary = Summary::new(&s, &y, &[]);
                let want = choose_summary(p, &s, &y, &summary);
                if let Some(t) = fixed_tau(p) {
                    if summary.confusion_at(t).is_none() {
                        assert!(choose_on_summary(p, &summary).is_none());
                        summary = Summary::new(&s, &y, &[t]);
                    }
                }
                assert_eq!(choose_on_summary(p, &summary), Some(want), "{p:?}");
            }
            let conformal = ThresholdPolicy::Conformal {
                max_false_positive_rate: 0.1,
            };
            assert!(choose_on_summary(conformal, &Summary::new(&s, &y, &[])).is_none());
        }
    }

    #[test]
    fn an_unmet_precision_target_says_so_with_the_closest_point() {
        let s = [5.0, 4.0, 3.0, 2.0, 1.0];
        let y = [false, true, false, true, false];
        let c = choose(
            ThresholdPolicy::PrecisionTarget { min_precision: 0.9 },
            &s,
            &y,
        );
        assert!(!c.met);
        let note = c.note.unwrap();
        assert!(
            note.contains("cannot be met") && note.contains("precision 0.5000 at recall 1.0000"),
            "{note}"
        );
        let c = choose(
            ThresholdPolicy::PrecisionTarget { min_precision: 0.5 },
            &s,
            &y,
        );
        assert!(c.met);
        assert_eq!(c.confusion.tp, 2);
    }

    #[test]
    fn fixed_threshold_from_ln_epsilon() {
        let s = [5.0, 4.0, 3.0];
        let y = [true, false, false];
        let c = choose(
            ThresholdPolicy::Fixed {
                tau: None,
                ln_epsilon: Some(-4.5),
            },
            &s,
            &y,
        );
        assert_eq!(c.tau, 4.5);
        assert_eq!(c.confusion.tp + c.confusion.fp, 1);
    }

    /// Fβ formula check against REFERENCES.md section 5 (TP 8, FP 3, FN 2):
    /// F2 = 40/51, F0.5 = 20/27.
    #[test]
    fn f_beta_matches_the_exact_fractions() {
        let c = Confusion {
            tp: 8,
            fp: 3,
            fn_: 2,
            tn: 1987,
        };
        assert!((f_beta(&c, 2.0) - 0.7843137254901961).abs() <= 1e-12);
        assert!((f_beta(&c, 0.5) - 0.7407407407407407).abs() <= 1e-12);
        assert!((f_beta(&c, 1.0) - 0.7619047619047619).abs() <= 1e-12);
    }

    /// The conformal policy's τ flags exactly the validation normals whose
    /// conformal p-value (computed by its definition) is at most A.
    #[test]
    fn conformal_tau_flags_the_rows_with_small_p_values() {
        let s = [0.5, 1.0, 1.0, 2.0, 3.0, 4.0, 9.0, 8.0];
        let y = [false, false, false, false, false, false, true, true];
        // n = 6 normals; A = 0.3: m = ⌊0.3 · 7⌋ = 2, k = 5, τ = 3 (5th smallest).
        let c = conformal(&s, &y, 0.3);
        assert!(c.met);
        assert_eq!(c.tau, 3.0);
        assert_eq!(c.confusion.fp, 1);
        assert_eq!(c.confusion.tp, 2);
        let normals: Vec<f64> = s.iter().zip(&y).filter(|p| !p.1).map(|p| *p.0).collect();
        for &x in &s {
            let p = (1 + normals.iter().filter(|&&v| v >= x).count()) as f64 / 7.0;
            assert_eq!(x > c.tau, p <= 0.3, "{x}");
        }
        let c = conformal(&s, &y, 0.1);
        assert!(!c.met);
        assert!(c
            .note
            .unwrap()
            .contains("at least 9 validation normals, found 6"));
    }

    #[test]
    fn adjacent_doubles_keep_the_decision() {
        let hi = 1.0f64;
        let lo = below(hi);
        assert_eq!(between(hi, lo), lo);
        assert!(hi > between(hi, lo) && lo <= between(hi, lo));
    }
}
