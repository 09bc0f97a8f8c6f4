//! Conformal p-values, the conformal threshold and Benjamini-Hochberg
//! flagging. Pure functions of scores: no I/O, no formatting.
//!
//! The calibration set is the validation normal rows of one candidate, never
//! used to fit it. For a row with score s, p(s) = (1 + #{calibration scores
//! ≥ s}) / (n + 1) (Vovk, Gammerman and Shafer 2005, "Algorithmic Learning in
//! a Random World"; Bates, Candès, Lei, Romano and Sesia 2023, "Testing for
//! outliers with conformal p-values", Annals of Statistics 51(1)). For a new
//! normal row exchangeable with the calibration rows, P(p ≤ a) ≤ a for every
//! a in [0, 1].
//!
//! p takes only the values j / (n + 1), j = 1, …, n + 1, so every decision
//! here is made on the integer j: the flag rule p ≤ A and the threshold rule
//! s > τ are the same test (see [`Calibration::cut`]), ties included.

/// The calibration scores of one candidate (validation normals), sorted:
/// every one while there are at most [`Thinning::DEFAULT`]'s `tail + body`;
/// beyond that the highest `tail` scores and `body` evenly spaced order
/// statistics below them, each with its rank (see [`Thinning`]).
#[derive(Debug, Clone, PartialEq)]
pub struct Calibration {
    /// n, the calibration rows.
    n: usize,
    /// The kept scores, ascending.
    sorted: Vec<f64>,
    /// Their ranks (from 1, ascending, the last n) when some were left out.
    ranks: Option<Vec<usize>>,
}

/// How many calibration scores run.json keeps when there are many: the
/// highest `tail` exactly, and `body` order statistics at evenly spaced
/// ranks below them. A p-value is then exact while fewer than `tail`
/// calibration scores lie at or above the row's score (p below about
/// tail / n: every p-value a screening or false-discovery rule looks at),
/// and above that it errs high by less than n / body ranks, which keeps
/// P(p ≤ a) ≤ a. The conformal cut is exact while its rank lies in the
/// tail and otherwise sits at the next kept score (fewer false alarms,
/// never more). Without this, run.json would hold one score per
/// validation normal row: millions on a large run.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Thinning {
    /// The highest scores kept exactly.
    pub tail: usize,
    /// The evenly spaced order statistics kept below the tail.
    pub body: usize,
}

impl Thinning {
    /// At most 30,000 scores in run.json (about 1.2 MB with their ranks).
    pub const DEFAULT: Thinning = Thinning {
        tail: 20_000,
        body: 10_000,
    };

    /// The ranks (from 1, ascending) of the kept scores of `n`, or `None`
    /// when every score is kept (n ≤ tail + body): ⌈i·n / body⌉ for
    /// i = 1, …, body below the tail, then n − tail + 1, …, n.
    pub fn ranks(self, n: usize) -> Option<Vec<usize>> {
        if n <= self.tail + self.body {
            return None;
        }
        let first_tail = n - self.tail + 1;
        let mut ranks: Vec<usize> = (1..=self.body)
            .map(|i| (i * n).div_ceil(self.body))
            .filter(|&r| r < first_tail)
            .collect();
        ranks.dedup();
        ranks.extend(first_tail..=n);
        Some(ranks)
    }
}

/// The conformal operating point at a false-alarm level A.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ConformalCut {
    /// m: the largest j with j / (n + 1) ≤ A (as doubles); flag iff
    /// 1 + #{calibration ≥ s} ≤ m.
    pub m: usize,
    /// k = n + 1 − m: τ is the k-th smallest calibration score.
    pub k: usize,
    /// Flag iff s > τ.
    pub tau: f64,
}

/// A level A below 1/(n + 1): no row could ever be flagged.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TooFewNormals {
    /// The calibration rows there are.
    pub have: usize,
    /// The fewest calibration rows that make A reachable.
    pub need: usize,
}

impl Calibration {
    /// From the calibration scores in any order (sorted with `total_cmp`),
    /// thinned by [`Thinning::DEFAULT`].
    pub fn new(scores: Vec<f64>) -> Self {
        Calibration::thinned(scores, Thinning::DEFAULT)
    }

    /// From the calibration scores in any order, thinned by `thinning`.
    pub fn thinned(mut scores: Vec<f64>, thinning: Thinning) -> Self {
        // Values equal under the total order have the same bits, so any
        // sort gives the same vector: an unstable one on all cores.
        {
            use rayon::prelude::*;
            scores.par_sort_unstable_by(f64::total_cmp);
        }
        let n = scores.len();
        match thinning.ranks(n) {
            None => Calibration {
                n,
                sorted: scores,
                ranks: None,
            },
            Some(ranks) => Calibration {
                n,
                sorted: ranks.iter().map(|&r| scores[r - 1]).collect(),
                ranks: Some(ranks),
            },
        }
    }

    /// From kept scores already sorted ascending and their ranks (as
    /// run.json keeps them; `None`: every one of `n` kept); `None` when they
    /// are not sorted, hold a NaN, or the ranks do not rise to n.
    pub fn from_kept(n: usize, sorted: Vec<f64>, ranks: Option<Vec<usize>>) -> Option<Self> {
        let ok = sorted.iter().all(|v| !v.is_nan())
            && sorted.windows(2).all(|w| w[0].total_cmp(&w[1]).is_le())
            && match &ranks {
                None => sorted.len() == n,
                Some(r) => {
                    r.len() == sorted.len()
                        && r.first().is_some_and(|&f| f >= 1)
                        && r.windows(2).all(|w| w[0] < w[1])
                        && r.last() == Some(&n)
                }
            };
        ok.then_some(Calibration { n, sorted, ranks })
    }

    /// The calibration normals of `scores` (rows where `is_anomaly` is false).
    pub fn of_normals(scores: &[f64], is_anomaly: &[bool]) -> Self {
        Calibration::new(
            scores
                .iter()
                .zip(is_anomaly)
                .filter(|(_, &a)| !a)
                .map(|(&s, _)| s)
                .collect(),
        )
    }

    /// n, the number of calibration rows (kept or not).
    pub fn len(&self) -> usize {
        self.n
    }

    /// Whether there are no calibration scores.
    pub fn is_empty(&self) -> bool {
        self.n == 0
    }

    /// The kept scores, ascending.
    pub fn sorted(&self) -> &[f64] {
        &self.sorted
    }

    /// The kept scores' ranks (from 1), or `None` when every score is kept.
    pub fn ranks(&self) -> Option<&[usize]> {
        self.ranks.as_deref()
    }

    /// The rank (from 1) of the `i`-th kept score.
    fn rank_of(&self, i: usize) -> usize {
        self.ranks.as_ref().map_or(i + 1, |r| r[i])
    }

    /// #{calibration scores ≥ s}: n minus the highest rank of a kept score
    /// below s. Exact when every score is kept, or while fewer than the
    /// tail's scores are ≥ s; otherwise high by less than the ranks' spacing.
    pub fn at_or_above(&self, s: f64) -> usize {
        match self.sorted.partition_point(|&v| v < s) {
            0 => self.n,
            below => self.n - self.rank_of(below - 1),
        }
    }

    /// j = 1 + #{calibration ≥ s}: p(s) = j / (n + 1).
    pub fn rank(&self, s: f64) -> usize {
        1 + self.at_or_above(s)
    }

    /// The conformal p-value of a score.
    pub fn p_value(&self, s: f64) -> f64 {
        self.rank(s) as f64 / (self.n + 1) as f64
    }

    /// The cut at level A: m, the largest j with j / (n + 1) ≤ A, and
    /// τ = the k-th smallest calibration score, k = n + 1 − m, which is
    /// ⌈(1 − A)(n + 1)⌉ in exact arithmetic (when rank k was not kept, the
    /// kept score of the next rank above it, and k that rank).
    ///
    /// The two rules agree exactly, with [`Calibration::at_or_above`] as
    /// defined. If s > τ = s₍ₖ₎, the kept scores up to rank k are below s,
    /// so #{≥ s} ≤ n − k and j ≤ n − k + 1 = m. If s ≤ s₍ₖ₎, every kept
    /// score from rank k on is ≥ s, so the highest kept rank below s is
    /// below k, #{≥ s} ≥ n − k + 1 and j ≥ n − k + 2 = m + 1 (with a rank
    /// moved up to a kept one, m here is n + 1 − k, at most the largest j
    /// with j / (n + 1) ≤ A). Since the p-value is compared as the same
    /// double j / (n + 1), p ≤ A ⟺ s > τ (division by a fixed n + 1 is
    /// monotone in j).
    pub fn cut(&self, a: f64) -> Result<ConformalCut, TooFewNormals> {
        let n = self.n;
        let m = largest_rank_at_most(a, n);
        if m == 0 {
            return Err(TooFewNormals {
                have: n,
                need: normals_needed(a),
            });
        }
        let k = n + 1 - m;
        // m = n + 1 (A = 1, which the spec refuses) flags everything.
        if k == 0 {
            return Ok(ConformalCut {
                m,
                k,
                tau: f64::NEG_INFINITY,
            });
        }
        // The first kept score of rank k or above (rank n is always kept).
        let i = match &self.ranks {
            None => k - 1,
            Some(r) => r.partition_point(|&r| r < k),
        };
        let k = self.rank_of(i);
        Ok(ConformalCut {
            m: n + 1 - k,
            k,
            tau: self.sorted[i],
        })
    }
}

/// The largest j in 0..=n+1 with j / (n + 1) ≤ a as doubles.
pub fn largest_rank_at_most(a: f64, n: usize) -> usize {
    let d = (n + 1) as f64;
    let ok = |j: usize| j as f64 / d <= a;
    let mut m = ((a * d).floor().max(0.0) as usize).min(n + 1);
    while m < n + 1 && ok(m + 1) {
        m += 1;
    }
    while m > 0 && !ok(m) {
        m -= 1;
    }
    m
}

/// Refuses a conformal level A that `validation_normals` rows cannot reach
/// (A < 1/(n + 1): no rank k ≥ 1 has k/(n + 1) ≤ A), naming the count it
/// needs; the one wording for `run` and `check`.
pub fn check_level(a: f64, validation_normals: usize) -> crate::error::Result<()> {
    if largest_rank_at_most(a, validation_normals) > 0 {
        return Ok(());
    }
    Err(crate::error::Error::Protocol {
        message: format!(
            "threshold `conformal`: a false-alarm level of `{}` needs at least `{}` \
             validation normal rows, and the validation split has `{validation_normals}`; \
             enlarge the validation split or raise `max-false-positive-rate`",
            crate::float::fmt_f64(a),
            normals_needed(a)
        ),
    })
}

/// The fewest calibration rows n with 1 / (n + 1) ≤ a (a in (0, 1]).
pub fn normals_needed(a: f64) -> usize {
    if a.is_nan() || a <= 0.0 {
        return usize::MAX;
    }
    let mut n = ((1.0 / a).ceil() as usize).saturating_sub(1);
    while n > 0 && 1.0 / (n as f64) <= a {
        n -= 1;
    }
    while 1.0 / ((n + 1) as f64) > a {
        n += 1;
    }
    n
}

/// The Benjamini-Hochberg procedure's outcome on one batch.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct BhCut {
    /// Rejections: rows with p ≤ the cut.
    pub rejected: u64,
    /// The cut: the largest p-value rejected (null when none is).
    pub p_cut: Option<f64>,
}

/// Benjamini-Hochberg at level q (Benjamini and Hochberg 1995, JRSS B 57(1),
/// 289–300): with p₍₁₎ ≤ … ≤ p₍ₘ₎, reject the k smallest for the largest k
/// with p₍ₖ₎ ≤ k q / m. Works on any p-values.
pub fn bh(p: &[f64], q: f64) -> BhCut {
    let mut s: Vec<f64> = p.to_vec();
    s.sort_by(f64::total_cmp);
    let m = s.len() as f64;
    let mut best: Option<usize> = None;
    for (i, &v) in s.iter().enumerate() {
        if v <= (i + 1) as f64 * q / m {
            best = Some(i);
        }
    }
    match best {
        Some(i) => {
            // Ties with p₍ₖ₎ are rejected with it.
            let cut = s[i];
            BhCut {
                rejected: s.iter().filter(|&&v| v <= cut).count() as u64,
                p_cut: Some(cut),
            }
        }
        None => BhCut {
            rejected: 0,
            p_cut: None,
        },
    }
}

/// Benjamini-Hochberg from conformal ranks: `counts[j]` rows have p = j /
/// (n + 1) (j = 0 unused). The same outcome as [`bh`] on the expanded
/// p-values: within a group of tied p-values the condition p ≤ k q / m is
/// easiest at the group's last k, so only group ends need checking.
pub fn bh_ranks(counts: &[u64], q: f64) -> BhCut {
    let total: u64 = counts.iter().sum();
    let d = counts.len().saturating_sub(1) as f64;
    let m = total as f64;
    let (mut k, mut best) = (0u64, None);
    for (j, &c) in counts.iter().enumerate().skip(1) {
        if c == 0 {
            continue;
        }
        k += c;
        let p = j as f64 / d;
        if p <= k as f64 * q / m {
            best = Some((k, p));
        }
    }
    match best {
        Some((k, p)) => BhCut {
            rejected: k,
            p_cut: Some(p),
        },
        None => BhCut {
            rejected: 0,
            p_cut: None,
        },
    }
}

/// Benjamini-Hochberg flagging of one scored batch.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct FdrSummary {
    /// Q, the level.
    pub q: f64,
    /// n, the validation normals the p-values are computed against.
    pub calibration_normals: usize,
    /// Rows flagged (p ≤ the cut).
    pub flagged: u64,
    /// The cut: the largest p-value flagged (null when none is).
    pub p_cut: Option<f64>,
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand_chacha::rand_core::{Rng, SeedableRng};

    /// Hand-made cases against the definition p = (1 + #{c ≥ s}) / (n + 1).
    #[test]
    fn p_values_follow_the_definition_on_hand_made_cases() {
        let c = Calibration::new(vec![3.0, 1.0, 2.0, 2.0]);
        // n = 4: scores ≥ 0.5 are all four → 5/5; ≥ 2 are 2, 2, 3 → 4/5;
        // ≥ 2.5 is 3 → 2/5; above everything → 1/5.
        assert_eq!(c.p_value(0.5), 1.0);
        assert_eq!(c.p_value(2.0), 4.0 / 5.0);
        assert_eq!(c.p_value(2.5), 2.0 / 5.0);
        assert_eq!(c.p_value(3.0), 2.0 / 5.0);
        assert_eq!(c.p_value(9.0), 1.0 / 5.0);
        assert_eq!(Calibration::new(vec![]).p_value(1.0), 1.0);
    }

    /// Brute force: on random tied scores and every level A on a grid, the
    /// threshold rule s > τ flags exactly the rows with p ≤ A, and τ is the
    /// ⌈(1 − A)(n + 1)⌉-th smallest score (exact rational arithmetic on the
    /// grid A = i / 200).
    #[test]
    fn the_threshold_rule_and_the_p_value_rule_flag_the_same_rows() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(30);
        for _ in 0..300 {
            let n = 1 + (rng.next_u32() % 60) as usize;
            let cal: Vec<f64> = (0..n).map(|_| (rng.next_u32() % 9) as f64 / 2.0).collect();
            let c = Calibration::new(cal.clone());
            let probe: Vec<f64> = (0..40)
                .map(|_| (rng.next_u32() % 11) as f64 / 2.0 - 0.5)
                .collect();
            for i in 1..=200u64 {
                let a = i as f64 / 200.0;
                match c.cut(a) {
                    Ok(cut) => {
                        // ⌈(1 − i/200)(n + 1)⌉ = ⌈(200 − i)(n + 1) / 200⌉ exactly.
                        let k = ((200 - i) * (n as u64 + 1)).div_ceil(200) as usize;
                        assert_eq!(cut.k, k, "n {n} a {a}");
                        for &s in &probe {
                            let direct = (1 + cal.iter().filter(|&&v| v >= s).count()) as f64
                                / (n + 1) as f64;
                            assert_eq!(s > cut.tau, direct <= a, "n {n} a {a} s {s}");
                            assert_eq!(c.p_value(s), direct);
                        }
                    }
                    Err(e) => {
                        assert!(a < 1.0 / (n + 1) as f64);
                        assert_eq!(e.have, n);
                        assert!(1.0 / (e.need + 1) as f64 <= a);
                        assert!(e.need == 0 || 1.0 / e.need as f64 > a);
                    }
                }
            }
        }
    }

    /// The kept ranks of a thinned calibration, worked by hand: n = 20,
    /// tail 3, body 4 keeps ⌈20i/4⌉ = 5, 10, 15 (20 is in the tail) and
    /// the tail 18, 19, 20; up to tail + body scores, every one.
    #[test]
    fn thinning_keeps_the_tail_and_evenly_spaced_ranks_below_it() {
        let t = Thinning { tail: 3, body: 4 };
        assert_eq!(t.ranks(7), None);
        assert_eq!(t.ranks(20), Some(vec![5, 10, 15, 18, 19, 20]));
        // A body rank that falls in the tail is kept once: ⌈9i/4⌉ = 3, 5, 7, 9.
        assert_eq!(t.ranks(9), Some(vec![3, 5, 7, 8, 9]));
        let c = Calibration::thinned((1..=20).rev().map(f64::from).collect(), t);
        assert_eq!(c.len(), 20);
        assert_eq!(c.sorted(), &[5.0, 10.0, 15.0, 18.0, 19.0, 20.0]);
        // Exact while fewer than the tail's 3 scores are at or above.
        assert_eq!(c.at_or_above(19.5), 1);
        assert_eq!(c.at_or_above(18.5), 2);
        // 18 has 3 (the tail's count): 16 and 17 were not kept, so it
        // counts 20 − 15 = 5.
        assert_eq!(c.at_or_above(18.0), 5);
        // Below it, high by less than the spacing: 12 has 9 at or above it,
        // counted as 20 − 10 = 10.
        assert_eq!(c.at_or_above(12.0), 10);
        assert_eq!(c.at_or_above(0.5), 20);
        // A record's ranks must rise to n, one per kept score.
        let kept = || c.sorted().to_vec();
        let ranks = c.ranks().map(<[usize]>::to_vec);
        assert_eq!(
            Calibration::from_kept(20, kept(), ranks.clone()),
            Some(c.clone())
        );
        assert_eq!(Calibration::from_kept(21, kept(), ranks.clone()), None);
        assert_eq!(Calibration::from_kept(20, kept(), None), None);
        assert_eq!(
            Calibration::from_kept(20, kept(), Some(vec![5, 10, 10, 18, 19, 20])),
            None
        );
        assert_eq!(
            Calibration::from_kept(20, kept(), Some(vec![0, 10, 15, 18, 19, 20])),
            None
        );
    }

    /// A thinned calibration's p-values are never below the exact ones
    /// (so P(p ≤ a) ≤ a still holds), are exact while fewer than `tail`
    /// scores lie at or above, and are high by less than the ranks'
    /// spacing; its cut flags exactly the rows whose p-value is ≤ A, and
    /// never more than the exact cut. Ties and repeated values included.
    #[test]
    fn a_thinned_calibration_errs_high_within_its_spacing_and_keeps_the_cut_rule() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(31);
        for _ in 0..200 {
            let n = 1 + (rng.next_u32() % 400) as usize;
            let t = Thinning {
                tail: 1 + (rng.next_u32() % 30) as usize,
                body: 1 + (rng.next_u32() % 30) as usize,
            };
            let cal: Vec<f64> = (0..n).map(|_| (rng.next_u32() % 97) as f64 / 4.0).collect();
            let exact = Calibration::thinned(cal.clone(), Thinning { tail: n, body: 0 });
            let c = Calibration::thinned(cal.clone(), t);
            assert_eq!(c.ranks().is_some(), n > t.tail + t.body);
            let spacing = n.div_ceil(t.body);
            for i in 0..60 {
                let s = i as f64 / 2.5 - 0.5;
                let (got, want) = (c.at_or_above(s), exact.at_or_above(s));
                assert!(got >= want && got - want < spacing, "n {n} {t:?} s {s}");
                if want < t.tail {
                    assert_eq!(got, want, "n {n} {t:?} s {s}");
                }
            }
            for i in 1..=100u64 {
                let a = i as f64 / 100.0;
                let (Ok(cut), Ok(full)) = (c.cut(a), exact.cut(a)) else {
                    assert!(a < 1.0 / (n + 1) as f64);
                    continue;
                };
                assert!(cut.m <= full.m && cut.tau >= full.tau, "n {n} {t:?} a {a}");
                for &s in &cal {
                    for s in [s - 0.125, s, s + 0.125] {
                        assert_eq!(s > cut.tau, c.p_value(s) <= a, "n {n} {t:?} a {a} s {s}");
                    }
                }
            }
        }
    }

    #[test]
    fn levels_below_one_over_n_plus_one_are_refused_with_the_count_needed() {
        let c = Calibration::new((0..19).map(f64::from).collect());
        assert_eq!(c.cut(0.05).unwrap().k, 19);
        assert_eq!(c.cut(0.05).unwrap().tau, 18.0);
        assert_eq!(c.cut(0.01), Err(TooFewNormals { have: 19, need: 99 }));
        assert_eq!(normals_needed(0.001), 999);
        assert_eq!(normals_needed(0.3), 3);
    }

    /// The worked example of Benjamini and Hochberg (1995), section 4.2: 15
    /// p-values, q = 0.05, four rejections. The values are the paper's as
    /// remembered (from memory, not re-checked against a copy of the paper).
    #[test]
    fn bh_reproduces_the_1995_worked_example() {
        let p = [
            0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262,
            0.5719, 0.6528, 0.7590, 1.000,
        ];
        let r = bh(&p, 0.05);
        assert_eq!(r.rejected, 4);
        assert_eq!(r.p_cut, Some(0.0095));
    }

    /// A seeded simulation with a known Gaussian. Normal rows are N(0, 1),
    /// anomalies N(3, 1), the score is the Gaussian's −ln density up to a
    /// constant (x²/2). Each of 2,000 batches draws fresh calibration normals
    /// (n = 199) and a batch of 90 normals and 10 anomalies. Conformal
    /// theory (Bates et al. 2023) gives E[false-alarm rate] ≤ A and, for BH
    /// on the batch's p-values, E[FDP] ≤ Q. The check allows the empirical
    /// means three Monte Carlo standard errors (the batch means' standard
    /// deviation / √2000) above A and Q; at n = 199 and A = 0.05 the expected
    /// false-alarm rate is exactly ⌊0.05 · 200⌋ / 200 = 0.05.
    #[test]
    fn simulated_false_alarm_rate_and_fdr_stay_within_their_levels() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3001);
        let mut unif = move || ((rng.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64;
        let mut gauss = move || {
            let (u, v) = (unif(), unif());
            libm::sqrt(-2.0 * libm::log(u)) * libm::cos(2.0 * std::f64::consts::PI * v)
        };
        let (a, q, batches) = (0.05, 0.1, 2000);
        let (mut fa, mut fdp) = (Vec::new(), Vec::new());
        let mut power = 0.0;
        for _ in 0..batches {
            let cal = Calibration::new((0..199).map(|_| gauss().powi(2) / 2.0).collect());
            let cut = cal.cut(a).unwrap();
            let rows: Vec<(f64, bool)> = (0..100)
                .map(|i| {
                    let anomaly = i >= 90;
                    let x = gauss() + if anomaly { 3.0 } else { 0.0 };
                    (x * x / 2.0, anomaly)
                })
                .collect();
            let normal_flags = rows.iter().filter(|r| !r.1 && r.0 > cut.tau).count();
            fa.push(normal_flags as f64 / 90.0);
            let p: Vec<f64> = rows.iter().map(|r| cal.p_value(r.0)).collect();
            let bh = bh(&p, q);
            let (mut v, mut r, mut t) = (0, 0, 0);
            for (row, &pv) in rows.iter().zip(&p) {
                if bh.p_cut.is_some_and(|c| pv <= c) {
                    r += 1;
                    v += usize::from(!row.1);
                    t += usize::from(row.1);
                }
            }
            fdp.push(if r == 0 { 0.0 } else { v as f64 / r as f64 });
            power += t as f64 / 10.0;
        }
        let mean_se = |x: &[f64]| {
            let n = x.len() as f64;
            let m = x.iter().sum::<f64>() / n;
            let var = x.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / (n - 1.0);
            (m, (var / n).sqrt())
        };
        let (m_fa, se_fa) = mean_se(&fa);
        let (m_fdp, se_fdp) = mean_se(&fdp);
        assert!(m_fa <= a + 3.0 * se_fa, "false-alarm rate {m_fa} ± {se_fa}");
        assert!(m_fdp <= q + 3.0 * se_fdp, "FDR {m_fdp} ± {se_fdp}");
        // And the guarantee is not met by flagging nothing.
        assert!(m_fa > a - 6.0 * se_fa, "{m_fa}");
        assert!(power / batches as f64 > 0.2, "{power}");
    }

    /// The rank form equals the direct form on random conformal ranks.
    #[test]
    fn bh_from_ranks_equals_bh_on_the_p_values() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(31);
        for _ in 0..300 {
            let n = 1 + (rng.next_u32() % 50) as usize;
            let rows = 1 + (rng.next_u32() % 80) as usize;
            let mut counts = vec![0u64; n + 2];
            let mut p = vec![];
            for _ in 0..rows {
                // Skewed towards small ranks so that some rows are rejected.
                let j = 1 + (rng.next_u32() as usize % (n + 1)) * (rng.next_u32() as usize % 2);
                counts[j] += 1;
                p.push(j as f64 / (n + 1) as f64);
            }
            for q in [0.05, 0.1, 0.3] {
                assert_eq!(bh_ranks(&counts, q), bh(&p, q));
            }
        }
    }
}
