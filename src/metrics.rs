//! Pure functions of (scores, labels, threshold): the confusion matrix, the
//! rates derived from it, the ranking metrics (average precision, ROC AUC),
//! Wilson and Clopper-Pearson intervals, and a seeded stratified bootstrap.
//!
//! No I/O and no formatting. A rate whose denominator is zero is `None`, never
//! a made-up 0 or 1. The bootstrap draws each replicate from its own ChaCha
//! stream, so its result is the same bits whatever the number of threads.

use rayon::prelude::*;

use crate::spec::BootstrapPlan;
use crate::summary::Summary;

pub use crate::decision::{Confusion, Threshold};

/// z for a two-sided 95 % interval: Φ⁻¹(0.975), as used in Newcombe (1998).
pub const Z_95: f64 = 1.959_963_984_540_054;

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
/// The draws are made on the scores' evaluation summary with τ as a cut
/// point ([`bootstrap_summary`]).
pub fn bootstrap(
    scores: &[f64],
    is_anomaly: &[bool],
    tau: f64,
    plan: BootstrapPlan,
    confidence: f64,
) -> BootstrapIntervals {
    let s = Summary::new(scores, is_anomaly, &[tau]);
    bootstrap_summary(&s, tau, plan, confidence).unwrap_or(BootstrapIntervals::NONE)
}

impl BootstrapIntervals {
    /// No intervals (no replicates, or a class without rows).
    pub const NONE: BootstrapIntervals = BootstrapIntervals {
        f1: None,
        average_precision: None,
        roc_auc: None,
    };
}

/// One class's Multinomial(n; cᵢ/n) over bins `(i, cᵢ)`, n = Σcᵢ: where n
/// rows drawn with replacement from the class fall.
struct Multinomial {
    /// (bin, rows there), for the non-empty bins.
    bins: Vec<(usize, u64)>,
    /// n.
    draws: u64,
    /// When n is at most a few times the number of bins: each row's bin, for
    /// drawing the n rows themselves (O(n), cheaper there than a binomial per
    /// bin).
    rows: Option<Vec<u32>>,
}

/// Rows per non-empty bin up to which a replicate draws the rows themselves.
const DIRECT_PER_BIN: u64 = 4;

impl Multinomial {
    fn new(bins: Vec<(usize, u64)>) -> Self {
        let draws: u64 = bins.iter().map(|b| b.1).sum();
        let rows = (draws <= DIRECT_PER_BIN * bins.len() as u64).then(|| {
            bins.iter()
                .flat_map(|&(i, c)| std::iter::repeat_n(i as u32, c as usize))
                .collect()
        });
        Multinomial { bins, draws, rows }
    }

    /// Adds one multinomial vector to `out` (zeroed). Either way is an exact
    /// draw of it: n independent uniform picks among the n rows, counted per
    /// bin, is the multinomial's definition; and the chain X₁ ~ Binomial(n,
    /// c₁/n), Xᵢ given X₁..Xᵢ₋₁ ~ Binomial(n − ΣX, cᵢ/(mass left)), the last
    /// bin taking the rest, is its factorisation into conditionals.
    fn draw(&self, rng: &mut rand_chacha::ChaCha8Rng, out: &mut [u64]) {
        if let Some(rows) = &self.rows {
            for _ in 0..self.draws {
                out[rows[crate::rng::below(rng, self.draws) as usize] as usize] += 1;
            }
            return;
        }
        let mut left = self.draws;
        let mut mass = self.draws;
        for &(i, c) in &self.bins {
            if left == 0 {
                break;
            }
            let x = if c >= mass {
                left
            } else {
                crate::rng::binomial(rng, left, c as f64 / mass as f64)
            };
            out[i] = x;
            left -= x;
            mass -= c;
        }
    }
}

/// The stratified bootstrap on an evaluation summary, at a τ the summary
/// can count (a cut point, or between a gap and its neighbours); `None` when
/// it cannot.
///
/// A replicate of row-level resampling draws n₁ anomalies uniformly with
/// replacement from the n₁ anomalies, and n₀ normal rows likewise from the
/// n₀ normal rows. Every statistic it reports (F1 at τ, average precision,
/// ROC AUC) depends on the draws only through how many fall in each bin of
/// the summary: anomalies per cut point, normal rows per gap and per tie
/// with a cut point (see [`Summary::ap_auc`]; τ is a bin boundary). Each of
/// the n₁ (or n₀) independent draws falls in bin i with probability cᵢ/n₁
/// (or cᵢ/n₀), so the vector of counts per bin is exactly
/// Multinomial(n₁; c/n₁) (and Multinomial(n₀; c/n₀), independent of it). A
/// multinomial vector is drawn exactly as a chain of binomials: X₁ ~
/// Binomial(n, p₁), and given X₁..Xᵢ₋₁, Xᵢ ~ Binomial(n − ΣX, pᵢ/(1 − Σp)),
/// the probabilities cᵢ/(mass left) being exact ratios of whole numbers
/// before rounding ([`crate::rng::binomial`] draws each exactly). So a
/// replicate here has the distribution of a row-level replicate, at
/// O(cut points) cost instead of O(rows). A class with at most four rows per
/// non-empty bin (typically the anomalies, few and mostly of distinct
/// scores) has its n rows drawn one by one instead, which is the same
/// multinomial and, there, no more than O(cut points) either.
pub fn bootstrap_summary(
    s: &Summary,
    tau: f64,
    plan: BootstrapPlan,
    confidence: f64,
) -> Option<BootstrapIntervals> {
    let (p_total, n_total) = (s.positives(), s.negatives());
    if plan.replicates == 0 || p_total == 0 || n_total == 0 {
        return Some(BootstrapIntervals::NONE);
    }
    let reps = replicates(s, tau, plan)?;
    Some(BootstrapIntervals {
        f1: interval(reps.iter().map(|r| r.0).collect(), confidence),
        average_precision: interval(reps.iter().map(|r| r.1).collect(), confidence),
        roc_auc: interval(reps.iter().map(|r| r.2).collect(), confidence),
    })
}

/// A bootstrap running beside the rest of the run: started on rayon's pool
/// as soon as its summary exists, so that its replicates fill the cores the
/// run's single-threaded parts leave idle, and waited for when the record
/// is written. The intervals are those of [`bootstrap_summary`], to the bit:
/// the replicates' streams do not depend on when or where they run.
pub struct PendingIntervals {
    /// The result, once received.
    done: std::sync::OnceLock<Option<BootstrapIntervals>>,
    /// Where the running bootstrap sends it (`None` when it was ready at once).
    rx: std::sync::Mutex<Option<std::sync::mpsc::Receiver<Option<BootstrapIntervals>>>>,
}

impl PendingIntervals {
    /// Starts the bootstrap of summary `s` at τ (at once when there is
    /// nothing to draw).
    pub fn start(s: &Summary, tau: f64, plan: BootstrapPlan, confidence: f64) -> Self {
        let (p_total, n_total) = (s.positives(), s.negatives());
        if plan.replicates == 0 || p_total == 0 || n_total == 0 {
            return PendingIntervals::ready(bootstrap_summary(s, tau, plan, confidence));
        }
        let (tx, rx) = std::sync::mpsc::channel();
        let s = s.clone();
        rayon::spawn(move || {
            let _t = crate::progress::part("bootstrap");
            // A panic would abort the pool: it becomes a missing result,
            // reported by `wait`.
            let r = std::panic::catch_unwind(|| bootstrap_summary(&s, tau, plan, confidence));
            let _ = tx.send(r.ok().flatten());
        });
        PendingIntervals {
            done: std::sync::OnceLock::new(),
            rx: std::sync::Mutex::new(Some(rx)),
        }
    }

    /// Intervals known already.
    pub fn ready(r: Option<BootstrapIntervals>) -> Self {
        PendingIntervals {
            done: std::sync::OnceLock::from(r),
            rx: std::sync::Mutex::new(None),
        }
    }

    /// The intervals, once the bootstrap has finished; `None` when τ split a
    /// gap of the summary (or the bootstrap failed). Call it outside rayon's
    /// pool: a pool thread waiting here could hold the thread the bootstrap
    /// needs.
    pub fn wait(&self) -> Option<BootstrapIntervals> {
        debug_assert!(
            rayon::current_thread_index().is_none(),
            "PendingIntervals::wait on a pool thread"
        );
        *self.done.get_or_init(|| {
            let rx = self.rx.lock().ok().and_then(|mut g| g.take());
            rx.and_then(|rx| rx.recv().ok().flatten())
        })
    }
}

/// Where a replicate's normal rows are counted: the summary's normal bins
/// in walk order (bin 2j: the gap above cut point j; 2j + 1: the rows tied
/// with it; 2m: the gap below the last), as prefix sums, and τ's boundary.
///
/// The bins above `top` (the top of the ranking, where anomalies are dense
/// and normal rows few per bin) are drawn row by row; the rest by the chain
/// of binomials. Given how many of the n₀ draws fall above `top`, K ~
/// Binomial(n₀, rows above top / n₀), those K draws are uniform picks among
/// the rows above `top` and the other n₀ − K among the rows below it, each
/// part a multinomial of its own (a multinomial split into two groups of
/// cells: exact). So a replicate costs one draw per row above `top` plus
/// one binomial per segment below it.
struct NormalBins {
    /// `prefix[t]`: normal rows in bins below `t` (2m + 2 entries).
    prefix: Vec<u64>,
    /// Normal rows in bins below this one are flagged at τ.
    tau_bin: usize,
    /// Bins below this one are drawn row by row.
    top: usize,
    /// Each row's bin, for the rows in bins below `top`.
    rows: Vec<u32>,
}

/// A binomial draw of the chain costs about as much as this many rows drawn
/// one by one (a uniform pick, a table read and a count): measured on the
/// benchmark's summaries, where an inversion or BTRS draw takes 40 to 60 ns
/// and a row 4 to 5 ns. The choice of `top` moves only the cost, never the
/// distribution.
const ROWS_PER_BINOMIAL: f64 = 10.0;

impl NormalBins {
    /// The bins of summary `s`, with τ splitting it after `flagged` cut
    /// points (and the gap below them when `gap_flagged`).
    ///
    /// `top` is the bin boundary that minimises the expected cost of a
    /// replicate: the rows above it, against the binomials the chain would
    /// draw there, one per non-empty bin of a cut point drawn (with
    /// probability 1 − e^(−a), a its anomalies, about that of one row among
    /// many being drawn at least once in n₁ draws); the first boundary of
    /// the least cost. Every boundary gives the same distribution.
    fn new(s: &Summary, flagged: usize, gap_flagged: bool) -> Self {
        let m = s.values.len();
        let mut prefix = Vec::with_capacity(2 * m + 2);
        let mut acc = 0u64;
        prefix.push(0);
        for j in 0..=m {
            acc += s.gaps[j].count;
            prefix.push(acc);
            if j < m {
                acc += s.tied[j];
                prefix.push(acc);
            }
        }
        // Saved binomials minus rows drawn, in rows, at each boundary t
        // (bins below t drawn row by row); the gap below the last cut point
        // is reached only as τ's bin or not at all, so it counts one draw.
        let (mut top, mut best, mut saved) = (0, 0.0f64, 0.0f64);
        for t in 1..prefix.len() {
            let bin = t - 1;
            if prefix[t] > prefix[bin] {
                let drawn = if bin == 2 * m {
                    1.0
                } else {
                    1.0 - libm::exp(-(s.pos[bin / 2] as f64))
                };
                saved += drawn * ROWS_PER_BINOMIAL;
            }
            let gain = saved - prefix[t] as f64;
            if gain > best {
                (top, best) = (t, gain);
            }
        }
        let rows = prefix[..=top]
            .windows(2)
            .enumerate()
            .flat_map(|(t, w)| std::iter::repeat_n(t as u32, (w[1] - w[0]) as usize))
            .collect();
        NormalBins {
            prefix,
            tau_bin: 2 * flagged + usize::from(gap_flagged),
            top,
            rows,
        }
    }
}

/// Every replicate's (F1 at τ, AP, AUC) for [`bootstrap_summary`], in
/// replicate order; `None` when τ splits a gap.
///
/// A replicate first draws the anomalies per cut point, then the normal rows
/// per *segment*: the bins between two drawn cut points merged into one, the
/// rows tied with a drawn cut point apart, and τ's boundary kept. Every
/// statistic reads the normal rows only through how many lie above each drawn
/// cut point, tie with it, or lie above τ (an anomaly drawn zero times adds
/// nothing to AP or AUC), and those are sums of whole segments. Merging cells
/// of a multinomial gives the multinomial of the merged cells, and the
/// segments depend on the anomaly draw alone, which is independent of the
/// normal draw; so given the anomalies, the segment counts are exactly
/// Multinomial(n₀; segment rows / n₀), and the replicate has the
/// distribution of a row-level one. About 1 − e⁻¹ ≈ 63 % of distinct
/// anomaly scores are drawn in a replicate, so this needs about two thirds
/// of the binomial draws one per bin would, and the walk visits drawn cut
/// points only.
///
/// The anomalies scoring above every normal row (the head of the ranking,
/// most of them for a detector that separates well) are drawn as one cell
/// per side of τ: each contributes p/n₁ to AP (its precision is 1) and
/// p·n₀ to the Mann-Whitney sum whatever its place in the head, so only the
/// head's count on each side of τ is read, and merging multinomial cells is
/// again exact. The cost of a replicate is then O(anomaly scores below the
/// first normal row), however many anomalies the head holds.
fn replicates(s: &Summary, tau: f64, plan: BootstrapPlan) -> Option<Vec<(f64, f64, f64)>> {
    let (p_total, n_total) = (s.positives(), s.negatives());
    let (flagged, gap_flagged) = s.split_at(tau)?;
    let m = s.values.len();
    let normal = NormalBins::new(s, flagged, gap_flagged);
    // The head: the cut points with no normal row above them or tied with
    // them. Every drawn anomaly there has precision 1 and every normal row
    // below it, so the statistics read the head's anomalies only through how
    // many are drawn on each side of τ: each side is one cell, counted at
    // its last cut point.
    let head = (0..m)
        .take_while(|&j| normal.prefix[2 * j + 2] == 0)
        .count();
    let split = head.min(flagged);
    let mut cells: Vec<(usize, u64)> = [(0, split), (split, head)]
        .into_iter()
        .filter_map(|(lo, hi)| {
            let c: u64 = s.pos[lo..hi].iter().sum();
            (c > 0).then(|| (hi - 1, c))
        })
        .collect();
    cells.extend((head..m).filter(|&j| s.pos[j] > 0).map(|j| (j, s.pos[j])));
    let pos = Multinomial::new(cells);
    Some(
        (0..plan.replicates)
            .into_par_iter()
            .map_init(
                || (vec![0u64; m], Vec::new()),
                |(p_in, n_in), b| {
                    let mut rng = crate::rng::seeded(plan.seed, u64::from(b));
                    p_in.fill(0);
                    pos.draw(&mut rng, p_in);
                    let normals = Segments::draw(&normal, n_in, &mut rng);
                    replicate(&normal, flagged, p_in, normals, &mut rng, p_total, n_total)
                },
            )
            .collect(),
    )
}

/// One replicate's F1 at τ, average precision and ROC AUC (NaN where
/// undefined), given its anomalies per cut point: the walk of
/// [`Summary::ap_auc`] over the drawn cut points, each segment's normal rows
/// taken as it is reached from `normals`. Below τ, `top` and the last drawn
/// cut point nothing is read, so nothing is drawn.
fn replicate(
    bins: &NormalBins,
    flagged: usize,
    p_in: &[u64],
    mut normals: Segments<'_>,
    rng: &mut rand_chacha::ChaCha8Rng,
    p_total: u64,
    n_total: u64,
) -> (f64, f64, f64) {
    let mut walk = crate::summary::RankingWalk::new(p_total as f64, n_total as f64);
    let (mut tp, mut fp, mut tau_done) = (0u64, 0u64, false);
    for (j, &p) in p_in.iter().enumerate() {
        if p == 0 {
            continue;
        }
        if j < flagged {
            tp += p;
        }
        if !tau_done && bins.tau_bin <= 2 * j + 1 {
            let x = normals.take(bins.tau_bin, rng);
            fp += x;
            walk.gap(x);
            tau_done = true;
        }
        let gap = normals.take(2 * j + 1, rng);
        let tied = normals.take(2 * j + 2, rng);
        if !tau_done {
            // τ's boundary lies below bin 2j + 1: both are flagged.
            fp += gap + tied;
        }
        walk.gap(gap);
        walk.cut(p, tied);
    }
    if !tau_done {
        fp += normals.take(bins.tau_bin, rng);
    }
    let (ap, auc) = walk.finish();
    let c = Confusion {
        tp,
        fp,
        fn_: p_total - tp,
        tn: n_total - fp,
    };
    (
        c.f1().unwrap_or(f64::NAN),
        ap.unwrap_or(f64::NAN),
        auc.unwrap_or(f64::NAN),
    )
}

/// A replicate's normal rows, segment by segment down the bins: each
/// [`Segments::take`] returns the rows in the bins from the last boundary to
/// the next.
struct Segments<'a> {
    bins: &'a NormalBins,
    /// Rows already drawn per bin, for the bins below `drawn`.
    n_in: &'a [u64],
    drawn: usize,
    /// The next segment's first bin.
    start: usize,
    /// Rows not yet placed, and the summary's rows in the bins left, below
    /// `drawn`.
    left: u64,
    mass: u64,
}

impl<'a> Segments<'a> {
    /// A replicate's start: K ~ Binomial(n₀, rows above `top` / n₀) of its
    /// n₀ draws fall above `top`, each a uniform pick among those rows,
    /// counted into `n_in`; the other n₀ − K wait for the chain.
    fn draw(
        bins: &'a NormalBins,
        n_in: &'a mut Vec<u64>,
        rng: &mut rand_chacha::ChaCha8Rng,
    ) -> Self {
        let total = bins.prefix[bins.prefix.len() - 1];
        let above = bins.prefix[bins.top];
        let k = if above == 0 {
            0
        } else {
            crate::rng::binomial(rng, total, above as f64 / total as f64)
        };
        n_in.clear();
        n_in.resize(bins.top, 0);
        for _ in 0..k {
            n_in[bins.rows[crate::rng::below(rng, above) as usize] as usize] += 1;
        }
        Segments {
            bins,
            n_in,
            drawn: bins.top,
            start: 0,
            left: total - k,
            mass: total - above,
        }
    }

    /// The rows in bins `start..end` (none when `end` is not past `start`):
    /// summed from the drawn bins above `drawn`, and below it drawn as the
    /// next link of the chain X ~ Binomial(rows left, segment rows / rows in
    /// the bins left).
    fn take(&mut self, end: usize, rng: &mut rand_chacha::ChaCha8Rng) -> u64 {
        let end = end.max(self.start);
        let start = std::mem::replace(&mut self.start, end);
        let mut x: u64 = self.n_in[start.min(self.drawn)..end.min(self.drawn)]
            .iter()
            .sum();
        let lo = start.max(self.drawn);
        if end <= lo {
            return x;
        }
        let c = self.bins.prefix[end] - self.bins.prefix[lo];
        let y = if c == 0 || self.left == 0 {
            0
        } else if c >= self.mass {
            self.left
        } else {
            crate::rng::binomial(rng, self.left, c as f64 / self.mass as f64)
        };
        self.left -= y;
        self.mass -= c;
        x += y;
        x
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
    /// Every metric of scores against labels at τ, row by row (the reference
    /// the summary's numbers are tested against; the bootstrap is drawn on
    /// the summary either way).
    pub fn of(
        scores: &[f64],
        is_anomaly: &[bool],
        tau: f64,
        beta: Option<f64>,
        boot: BootstrapPlan,
    ) -> Self {
        let c = Confusion::at(scores, is_anomaly, Threshold(tau));
        let (ap, auc) = ap_auc(scores, is_anomaly);
        Metrics::from_parts(
            c,
            ap,
            auc,
            beta,
            bootstrap(scores, is_anomaly, tau, boot, 0.95),
        )
    }

    /// Every metric at τ from the split's evaluation summary: the same
    /// numbers as [`Metrics::of`], to the bit. `None` when τ falls inside a
    /// gap's normal scores (make τ a cut point of the summary).
    pub fn of_summary(
        s: &Summary,
        tau: f64,
        beta: Option<f64>,
        boot: BootstrapPlan,
    ) -> Option<Self> {
        let c = s.confusion_at(tau)?;
        let (ap, auc) = s.ap_auc();
        let intervals = bootstrap_summary(s, tau, boot, 0.95)?;
        Some(Metrics::from_parts(c, ap, auc, beta, intervals))
    }

    fn from_parts(
        c: Confusion,
        ap: Option<f64>,
        auc: Option<f64>,
        beta: Option<f64>,
        bootstrap_95: BootstrapIntervals,
    ) -> Self {
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
            bootstrap_95,
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

    /// One row-level bootstrap replicate: n₁ anomalies and n₀ normal rows
    /// drawn uniformly with replacement within their class, as a weight per
    /// ranking position.
    fn row_draws(rng: &mut rand_chacha::ChaCha8Rng, r: &Ranked) -> Vec<u32> {
        let pos: Vec<usize> = (0..r.len()).filter(|&k| r.anomalous[k]).collect();
        let neg: Vec<usize> = (0..r.len()).filter(|&k| !r.anomalous[k]).collect();
        let mut w = vec![0u32; r.len()];
        for stratum in [&pos, &neg] {
            for _ in 0..stratum.len() {
                let i = crate::rng::below(rng, stratum.len() as u64) as usize;
                w[stratum[i]] += 1;
            }
        }
        w
    }

    /// F1 at τ, AP and AUC of row-level weights, by the row-level walk
    /// ([`ranking`]) and a full confusion count.
    fn row_replicate(r: &Ranked, w: &[u32], tau: f64) -> (f64, f64, f64) {
        let pt: f64 = (0..r.len())
            .filter(|&k| r.anomalous[k])
            .map(|k| f64::from(w[k]))
            .sum();
        let nt: f64 = (0..r.len())
            .filter(|&k| !r.anomalous[k])
            .map(|k| f64::from(w[k]))
            .sum();
        let mut c = Confusion::default();
        for (k, &wk) in w.iter().enumerate() {
            let wk = u64::from(wk);
            match (r.sorted[k] > tau, r.anomalous[k]) {
                (true, true) => c.tp += wk,
                (true, false) => c.fp += wk,
                (false, true) => c.fn_ += wk,
                (false, false) => c.tn += wk,
            }
        }
        let (ap, auc) = ranking(r, |k| f64::from(w[k]), pt, nt);
        (
            c.f1().unwrap_or(f64::NAN),
            ap.unwrap_or(f64::NAN),
            auc.unwrap_or(f64::NAN),
        )
    }

    /// A replicate counted in the summary's bins gives the same bits as
    /// weighting every ranking position by its draws and walking them all
    /// ([`ranking`] and a full confusion count), on scores with many ties.
    #[test]
    fn summary_replicate_equals_the_weighted_pass() {
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
            let sum = Summary::new(&s, &y, &[tau]);
            let (flagged, gap_flagged) = sum.split_at(tau).unwrap();
            let m = sum.values.len();
            let w = row_draws(&mut rng, &r);
            let mut p_in = vec![0u64; m];
            let mut n_in = vec![0u64; 2 * m + 1];
            for (k, &wk) in w.iter().enumerate() {
                let (j, on_cut) = sum.locate(r.sorted[k]);
                let wk = u64::from(wk);
                match (on_cut, r.anomalous[k]) {
                    (true, true) => p_in[j] += wk,
                    (true, false) => n_in[2 * j + 1] += wk,
                    (false, _) => n_in[2 * j] += wk,
                }
            }
            let want = row_replicate(&r, &w, tau);
            let bins = NormalBins::new(&sum, flagged, gap_flagged);
            let counted = Segments {
                bins: &bins,
                n_in: &n_in,
                drawn: n_in.len(),
                start: 0,
                left: 0,
                mass: 0,
            };
            let got = replicate(
                &bins,
                flagged,
                &p_in,
                counted,
                &mut rng,
                sum.positives(),
                sum.negatives(),
            );
            assert_eq!(
                (got.0.to_bits(), got.1.to_bits(), got.2.to_bits()),
                (want.0.to_bits(), want.1.to_bits(), want.2.to_bits()),
                "case {case}: n {n}, τ {tau}"
            );
        }
    }

    /// The summary's bootstrap against row-level resampling on one fixed case:
    /// 4,000 replicates of each (independent streams). The tolerances are
    /// derived for two independent samples of n = 4,000 from one
    /// distribution (common practice, no source):
    /// - means: the difference has standard error s·√(2/n), s the pooled
    ///   standard deviation of the replicates; allowed: 4 standard errors;
    /// - quantiles: for the q quantile x̂ of one sample, the other sample's
    ///   empirical distribution function at x̂ is q + O(√(2q(1 − q)/n)) (the
    ///   variances of F(x̂) − q and of F̂(x) − F(x) add); allowed: 4 such
    ///   standard errors (0.0140 at q = 2.5 %), with ties at x̂ counted from
    ///   the fraction strictly below to the fraction at or below.
    ///
    /// Four standard errors make a false alarm about 6·10⁻⁵ per check, and the
    /// streams are fixed, so the test is deterministic.
    #[test]
    fn summary_bootstrap_matches_row_resampling_in_distribution() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(404);
        // Tied scores, many normal rows per bin (the chain of binomials).
        let n = 2_000;
        let y: Vec<bool> = (0..n).map(|i| i % 50 == 0).collect();
        let s: Vec<f64> = (0..n)
            .map(|i| {
                let v = f64::from(rng.next_u32() % 60) / 20.0 + if y[i] { 1.2 } else { 0.0 };
                (v * 20.0).round() / 20.0
            })
            .collect();
        same_distribution(&s, &y);
        // Distinct scores, a few normal rows per bin (rows drawn one by one).
        let n = 600;
        let y: Vec<bool> = (0..n).map(|i| i % 4 == 0).collect();
        let s: Vec<f64> = (0..n)
            .map(|i| crate::rng::unit(&mut rng) + if y[i] { 0.6 } else { 0.0 })
            .collect();
        same_distribution(&s, &y);
        // Normal rows few between the top anomaly scores and many between
        // the lowest: the top drawn row by row, the rest by the chain.
        let n = 2_200;
        let y: Vec<bool> = (0..n).map(|i| i % 11 == 0).collect();
        let s: Vec<f64> = (0..n)
            .map(|i| {
                let u = crate::rng::unit(&mut rng);
                if y[i] {
                    u
                } else {
                    u * u * u
                }
            })
            .collect();
        let tau = crate::threshold::max_f1(&s, &y).tau;
        let sum = Summary::new(&s, &y, &[tau]);
        let (flagged, gap_flagged) = sum.split_at(tau).unwrap();
        let bins = NormalBins::new(&sum, flagged, gap_flagged);
        assert!(
            bins.top > 0 && bins.top < bins.prefix.len() - 1 && bins.prefix[bins.top] > 0,
            "top {} of {} bins",
            bins.top,
            bins.prefix.len() - 1
        );
        same_distribution(&s, &y);
        // A head of anomalies above every normal row, a few among them.
        let n = 1_000;
        let y: Vec<bool> = (0..n).map(|i| i % 10 == 0).collect();
        let s: Vec<f64> = (0..n)
            .map(|i| {
                let u = crate::rng::unit(&mut rng);
                match (y[i], i % 60 == 0) {
                    (true, false) => 2.0 + u,
                    (true, true) => 0.8 + u * 0.4,
                    (false, _) => u,
                }
            })
            .collect();
        same_distribution(&s, &y);
        // τ inside the head: its anomalies on both sides.
        same_distribution_at(&s, &y, 2.5);
    }

    fn same_distribution(s: &[f64], y: &[bool]) {
        same_distribution_at(s, y, crate::threshold::max_f1(s, y).tau);
    }

    fn same_distribution_at(s: &[f64], y: &[bool], tau: f64) {
        let (s, y) = (s.to_vec(), y.to_vec());
        let sum = Summary::new(&s, &y, &[tau]);
        let reps = 4_000u32;
        let new = replicates(
            &sum,
            tau,
            BootstrapPlan {
                replicates: reps,
                seed: 17,
            },
        )
        .unwrap();
        let r = ranked(&s, &y);
        let old: Vec<(f64, f64, f64)> = (0..reps)
            .map(|b| {
                let mut g = crate::rng::seeded(18, u64::from(b));
                row_replicate(&r, &row_draws(&mut g, &r), tau)
            })
            .collect();
        let nf = f64::from(reps);
        let pick = |v: &[(f64, f64, f64)], i: usize| -> Vec<f64> {
            let mut x: Vec<f64> = v.iter().map(|t| [t.0, t.1, t.2][i]).collect();
            x.sort_by(f64::total_cmp);
            x
        };
        for (i, name) in ["F1", "AP", "AUC"].into_iter().enumerate() {
            let (a, b) = (pick(&new, i), pick(&old, i));
            let mean = |x: &[f64]| x.iter().sum::<f64>() / nf;
            let var = |x: &[f64]| {
                let m = mean(x);
                x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (nf - 1.0)
            };
            let se = ((var(&a) + var(&b)) / 2.0).sqrt() * (2.0 / nf).sqrt();
            assert!(
                (mean(&a) - mean(&b)).abs() <= 4.0 * se,
                "{name}: means {} and {} (se {se})",
                mean(&a),
                mean(&b)
            );
            for q in [0.025, 0.975] {
                let tol = 4.0 * (2.0 * q * (1.0 - q) / nf).sqrt();
                for (x, other) in [(&a, &b), (&b, &a)] {
                    let xq = quantile(x, q);
                    let lt = other.partition_point(|&v| v < xq) as f64 / nf;
                    let le = other.partition_point(|&v| v <= xq) as f64 / nf;
                    assert!(
                        lt <= q + tol && le >= q - tol,
                        "{name}: the {q} quantile {xq} of one sample lies at [{lt}, {le}] \
                         of the other (allowed {q} ± {tol})"
                    );
                }
            }
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
