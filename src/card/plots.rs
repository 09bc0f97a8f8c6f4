//! The card's figures, drawn with plotters' SVG backend: precision-recall and
//! ROC curves with the operating point, the threshold policy's objective
//! against ln ε, score histograms by class with the threshold, and each
//! feature's training histogram under the fitted Gaussian marginal.
//!
//! Every figure is a pure function of its numbers: no fonts are measured (the
//! plotters build has no font backend, so text width is estimated from the
//! character count) and nothing depends on the clock or the platform, so the
//! same run gives the same SVG bytes. Text that comes from the data (feature
//! names) is escaped by the SVG backend.

use std::ops::Range;

use plotters::coord::ranged1d::{AsRangedCoord, ValueFormatter};
use plotters::coord::Shift;
use plotters::prelude::*;

use crate::error::{Error, Result};
use crate::metrics::{Confusion, Threshold};
use crate::spec::ThresholdPolicy;
use crate::threshold;

/// One figure: its file name in the run directory, a title, a caption and the SVG text.
#[derive(Debug, Clone, serde::Serialize)]
pub struct Plot {
    /// File name beside the card (no directory part).
    pub file: String,
    /// Short title.
    pub title: String,
    /// One or two sentences saying what the figure shows.
    pub caption: String,
    /// The SVG document.
    pub svg: String,
}

/// Scores, labels and τ of one split, for its figures.
#[derive(Debug, Clone, Copy)]
pub struct SplitScores<'a> {
    /// "validation" or "test".
    pub split: &'a str,
    /// s(x) = −ln p(x) per row.
    pub scores: &'a [f64],
    /// Label per row.
    pub is_anomaly: &'a [bool],
    /// The chosen τ (fixed on validation).
    pub tau: f64,
    /// The cut points where the curves bend, from [`crate::summary::curve`]
    /// (at most two per anomaly score, computed once for all of a split's
    /// figures; the precision-recall and ROC curves through them are exact).
    pub cuts: &'a [threshold::Cut],
}

impl SplitScores<'_> {
    /// What the figures read of these scores.
    pub fn facts(&self) -> ScoreFacts {
        ScoreFacts::of(self.scores, self.is_anomaly, self.tau)
    }

    /// The figures' view of these scores with their `facts`.
    pub fn with<'b>(&'b self, facts: &'b ScoreFacts) -> SplitFigures<'b> {
        SplitFigures {
            split: self.split,
            facts,
            tau: self.tau,
            cuts: self.cuts,
        }
    }
}

/// One split's score figures' input: what they read of the scores (made
/// from the scores, or from an engine's summaries of them), τ and the cut
/// points of its evaluation summary.
#[derive(Debug, Clone, Copy)]
pub struct SplitFigures<'a> {
    /// "validation" or "test".
    pub split: &'a str,
    /// What the figures read of the split's scores.
    pub facts: &'a ScoreFacts,
    /// The chosen τ (fixed on validation).
    pub tau: f64,
    /// The cut points where the curves bend, from [`crate::summary::curve`].
    pub cuts: &'a [threshold::Cut],
}

/// Bins of a score histogram.
pub const SCORE_BINS: usize = 48;

/// The ranks (from 0, in `f64::total_cmp` order among the `kept` scores
/// within ±[`AXIS_LIMIT`]) whose values the score figures' axes read: the
/// 0.1 % and 99.9 % quantiles (nearest rank) of the scores, then those of
/// their negations (ln ε) as ranks of the scores (negation reverses the
/// order exactly). Empty when no score is kept.
pub fn axis_ranks(kept: usize) -> Vec<usize> {
    if kept == 0 {
        return vec![];
    }
    let (a, b) = (rank_of(kept, 0.001), rank_of(kept, 0.999));
    vec![a, b, kept - 1 - a, kept - 1 - b]
}

/// The nearest rank of the `q`-quantile of `n` values.
fn rank_of(n: usize, q: f64) -> usize {
    ((n - 1) as f64 * q).round() as usize
}

/// Whether a value lies within a figure's axis limit (±[`AXIS_LIMIT`]).
pub fn within_axis_limit(x: f64) -> bool {
    x.abs() <= AXIS_LIMIT
}

/// The bin of `x` among `bins` equal bins over `r` (`None` outside it or
/// when not finite): the score and feature histograms' one binning.
pub fn bin_of(x: f64, r: &Range<f64>, bins: usize) -> Option<usize> {
    let w = (r.end - r.start) / bins as f64;
    if x < r.start || x > r.end || !x.is_finite() {
        return None;
    }
    Some((((x - r.start) / w) as usize).min(bins - 1))
}

/// The two axes of a split's score figures (the scores', and ln ε's),
/// fixed before the histogram counts on the first are taken.
#[derive(Debug, Clone, PartialEq)]
pub struct ScoreAxes {
    score: Axis,
    ln_eps: Axis,
}

impl ScoreAxes {
    /// The axes from the count of scores beyond ±[`AXIS_LIMIT`] (or not
    /// finite) and the kept scores' values at [`axis_ranks`] (empty when
    /// none is kept), with τ always in range when within the limit.
    pub fn new(beyond: u64, values: &[f64], tau: f64) -> ScoreAxes {
        let (score, ln_eps) = match values {
            [a, b, c, d] => (Some((*a, *b)), Some((-*c, -*d))),
            _ => (None, None),
        };
        ScoreAxes {
            score: axis_of(score, beyond > 0, &[tau]),
            ln_eps: axis_of(ln_eps, beyond > 0, &[-tau]),
        }
    }

    /// The score histogram's range, on which its bins are counted.
    pub fn score_range(&self) -> Range<f64> {
        self.score.range.clone()
    }
}

/// What a split's score figures read of its scores: the confusion matrix
/// at τ (with the class sizes), the two axes, and the histogram counts per
/// class on the score axis ([`SCORE_BINS`] bins, and the rows outside).
/// Made from the scores ([`ScoreFacts::of`]) or from an engine's summaries
/// ([`ScoreFacts::new`]): equal facts draw equal figures.
#[derive(Debug, Clone, PartialEq)]
pub struct ScoreFacts {
    at: Confusion,
    axes: ScoreAxes,
    normal: (Vec<u64>, u64),
    anomalous: (Vec<u64>, u64),
}

impl ScoreFacts {
    /// The facts of scores in memory.
    pub fn of(scores: &[f64], is_anomaly: &[bool], tau: f64) -> ScoreFacts {
        let kept: std::borrow::Cow<'_, [f64]> = if scores.iter().all(|&x| within_axis_limit(x)) {
            std::borrow::Cow::Borrowed(scores)
        } else {
            std::borrow::Cow::Owned(
                scores
                    .iter()
                    .copied()
                    .filter(|&x| within_axis_limit(x))
                    .collect(),
            )
        };
        let values: Vec<f64> = axis_ranks(kept.len())
            .into_iter()
            .map(|k| order_statistic(&kept, k))
            .collect();
        let axes = ScoreAxes::new((scores.len() - kept.len()) as u64, &values, tau);
        let r = axes.score_range();
        let class = |anomalous: bool| -> Vec<f64> {
            scores
                .iter()
                .zip(is_anomaly)
                .filter(|(_, &a)| a == anomalous)
                .map(|(v, _)| *v)
                .collect()
        };
        let (normal, anomalous) = (
            bin_counts(&class(false), &r, SCORE_BINS),
            bin_counts(&class(true), &r, SCORE_BINS),
        );
        ScoreFacts {
            at: Confusion::at(scores, is_anomaly, Threshold(tau)),
            axes,
            normal,
            anomalous,
        }
    }

    /// The facts from their parts: the confusion matrix at τ, the axes, and
    /// the normal and anomalous rows per bin of the score range (and
    /// outside it), [`SCORE_BINS`] bins each.
    pub fn new(
        at: Confusion,
        axes: ScoreAxes,
        normal: (Vec<u64>, u64),
        anomalous: (Vec<u64>, u64),
    ) -> Result<ScoreFacts> {
        if normal.0.len() != SCORE_BINS || anomalous.0.len() != SCORE_BINS {
            return Err(Error::internal(
                "score histogram counts of another bin count",
            ));
        }
        Ok(ScoreFacts {
            at,
            axes,
            normal,
            anomalous,
        })
    }
}

const NORMAL: RGBColor = RGBColor(37, 99, 235);
const ANOMALY: RGBColor = RGBColor(217, 119, 6);
const MARK: RGBColor = RGBColor(190, 18, 60);
const GREY: RGBColor = RGBColor(120, 120, 120);
const WIDE: (u32, u32) = (640, 400);
const SMALL: (u32, u32) = (420, 280);

type Area<'a> = DrawingArea<SVGBackend<'a>, Shift>;
type DrawResult = std::result::Result<(), Box<dyn std::error::Error>>;

fn draw(
    file: &str,
    size: (u32, u32),
    body: impl FnOnce(&Area<'_>) -> DrawResult,
) -> Result<String> {
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, size).into_drawing_area();
        let drawn = root
            .fill(&WHITE)
            .map_err(|e| e.into())
            .and_then(|()| body(&root))
            .and_then(|()| root.present().map_err(|e| e.into()));
        drawn.map_err(|e| Error::internal(format!("drawing {file}: {e}")))?;
    }
    Ok(svg)
}

/// A chart on an SVG drawing area with the coordinates of ranges `X` and `Y`.
type Chart<'a, 'b, X, Y> = ChartContext<
    'a,
    SVGBackend<'b>,
    Cartesian2d<<X as AsRangedCoord>::CoordDescType, <Y as AsRangedCoord>::CoordDescType>,
>;

/// The frame every wide figure shares: caption, margins, label areas.
fn frame<'a, 'b, X: AsRangedCoord, Y: AsRangedCoord>(
    root: &'a Area<'b>,
    caption: String,
    y_area: u32,
    x: X,
    y: Y,
) -> std::result::Result<Chart<'a, 'b, X, Y>, Box<dyn std::error::Error>> {
    Ok(ChartBuilder::on(root)
        .caption(caption, ("sans-serif", 18))
        .margin(12)
        .x_label_area_size(42)
        .y_label_area_size(y_area)
        .build_cartesian_2d(x, y)?)
}

/// The legend box every wide figure shares.
fn legend<'a, 'b: 'a, X: Ranged, Y: Ranged>(
    chart: &mut ChartContext<'a, SVGBackend<'b>, Cartesian2d<X, Y>>,
    at: SeriesLabelPosition,
) -> DrawResult {
    chart
        .configure_series_labels()
        .position(at)
        .background_style(WHITE.mix(0.9))
        .border_style(GREY)
        .draw()?;
    Ok(())
}

/// Keeps the points of a curve that move at least 1/500 of the plot from the
/// last kept one (and always the first and last), so that a curve over a
/// million validation rows stays a small file.
fn thin(points: &[(f64, f64)], span: (f64, f64)) -> Vec<(f64, f64)> {
    let step = 1.0 / 500.0;
    let (sx, sy) = (span.0.max(f64::MIN_POSITIVE), span.1.max(f64::MIN_POSITIVE));
    let mut out: Vec<(f64, f64)> = Vec::new();
    for (i, &p) in points.iter().enumerate() {
        let keep = match out.last() {
            None => true,
            Some(&q) => i + 1 == points.len() || ((p.0 - q.0) / sx).hypot((p.1 - q.1) / sy) >= step,
        };
        if keep {
            out.push(p);
        }
    }
    out
}

/// The `q`-quantile of `v` (nearest rank, in `f64::total_cmp` order; O(n)).
///
/// A rank near either end (the axis ranges ask for 0.1 % and 99.9 %) is
/// found in one pass that keeps the `k + 1` most extreme values in a heap;
/// any other by selection on a copy. Values equal in the total order have
/// the same bits, so both give the same value.
fn quantile(v: &[f64], q: f64) -> f64 {
    order_statistic(v, rank_of(v.len(), q))
}

/// The `k`-th smallest of `v` (from 0, in `f64::total_cmp` order; O(n)),
/// as [`quantile`] finds it.
fn order_statistic(v: &[f64], k: usize) -> f64 {
    let n = v.len();
    if k < n / 16 {
        return f64_of_key(kth_smallest_key(v.iter().map(|&x| key_of_f64(x)), k));
    }
    if n - 1 - k < n / 16 {
        let top = kth_smallest_key(v.iter().map(|&x| !key_of_f64(x)), n - 1 - k);
        return f64_of_key(!top);
    }
    let mut c = v.to_vec();
    let (_, x, _) = c.select_nth_unstable_by(k, f64::total_cmp);
    *x
}

/// An integer whose order is `f64::total_cmp`'s (the map that method
/// uses); [`f64_of_key`] undoes it.
fn key_of_f64(x: f64) -> i64 {
    let b = x.to_bits() as i64;
    b ^ ((((b >> 63) as u64) >> 1) as i64)
}

fn f64_of_key(k: i64) -> f64 {
    f64::from_bits((k ^ ((((k >> 63) as u64) >> 1) as i64)) as u64)
}

/// The `k`-th smallest key (from 0): the largest of the `k + 1` smallest,
/// kept in a max-heap through one pass.
fn kth_smallest_key(keys: impl Iterator<Item = i64>, k: usize) -> i64 {
    let mut heap = std::collections::BinaryHeap::with_capacity(k + 1);
    for x in keys {
        if heap.len() <= k {
            heap.push(x);
        } else if let Some(mut top) = heap.peek_mut() {
            if x < *top {
                *top = x;
            }
        }
    }
    *heap.peek().expect("k < n keys")
}

/// The largest magnitude an axis reaches. plotters' key points need a finite
/// width that a few ticks can divide; beyond about 1e154 the square of a
/// value, and near 1.8e308 a width, is no longer finite, and a range of a few
/// ulps never gives enough ticks. Common practice, no source: 1e150 leaves
/// room for the padding and the tick arithmetic.
const AXIS_LIMIT: f64 = 1e150;

/// A plotted range and whether values were left out of it beyond
/// [`AXIS_LIMIT`] (infinite or huge), which the caption then says.
#[derive(Debug, Clone, PartialEq)]
struct Axis {
    range: Range<f64>,
    clipped: bool,
}

impl Axis {
    /// The caption's sentence when values were left out, else nothing.
    fn note(&self) -> &'static str {
        if self.clipped {
            " Values that are infinite or beyond ±1e150 are left out of the axis range (they are not drawn)."
        } else {
            ""
        }
    }
}

/// The plotted range of a score or feature axis, the one every figure with a
/// data-dependent axis uses: the 0.1 % and 99.9 % quantiles of the values
/// within ±[`AXIS_LIMIT`], widened to take in the `must` values within it,
/// widened to at least a millionth of its magnitude (or ±0.5) when it is
/// (nearly) a single value, and padded by 3 %. Always finite, never empty.
fn axis_range(v: &[f64], must: &[f64]) -> Axis {
    let within = |x: &f64| within_axis_limit(*x);
    let kept: std::borrow::Cow<'_, [f64]> = if v.iter().all(within) {
        std::borrow::Cow::Borrowed(v)
    } else {
        std::borrow::Cow::Owned(v.iter().copied().filter(within).collect())
    };
    let quantiles = (!kept.is_empty()).then(|| (quantile(&kept, 0.001), quantile(&kept, 0.999)));
    axis_of(quantiles, kept.len() < v.len(), must)
}

/// [`axis_range`] from the kept values' 0.1 % and 99.9 % quantiles (`None`
/// when none is kept) and whether any value was beyond the limit.
fn axis_of(quantiles: Option<(f64, f64)>, beyond: bool, must: &[f64]) -> Axis {
    let within = |x: &f64| within_axis_limit(*x);
    let clipped = beyond || !must.iter().all(within);
    let (mut lo, mut hi) = quantiles.unwrap_or((0.0, 1.0));
    for m in must.iter().filter(|m| within(m)) {
        lo = lo.min(*m);
        hi = hi.max(*m);
    }
    let magnitude = lo.abs().max(hi.abs());
    if hi - lo <= (f64::EPSILON * hi.abs().max(1.0)).max(1e-9 * magnitude) {
        let half = 0.5f64.max(1e-6 * magnitude);
        lo -= half;
        hi += half;
    }
    let pad = 0.03 * (hi - lo);
    Axis {
        range: (lo - pad)..(hi + pad),
        clipped,
    }
}

fn recall(c: &Confusion) -> f64 {
    c.tp as f64 / (c.tp + c.fn_).max(1) as f64
}
fn fpr(c: &Confusion) -> f64 {
    c.fp as f64 / (c.fp + c.tn).max(1) as f64
}

/// Precision against recall over every cut point, with the operating point at τ.
pub fn precision_recall(s: SplitFigures<'_>) -> Result<Plot> {
    let cuts = s.cuts;
    let points: Vec<(f64, f64)> = cuts
        .iter()
        .map(|cut| &cut.c)
        .filter(|c| c.tp + c.fp > 0)
        .map(|c| (recall(c), c.tp as f64 / (c.tp + c.fp) as f64))
        .collect();
    let points = thin(&points, (1.0, 1.0));
    let at = s.facts.at;
    let op = (recall(&at), at.precision().unwrap_or(0.0));
    let base = (at.tp + at.fn_) as f64 / (at.tp + at.fn_ + at.fp + at.tn).max(1) as f64;
    let file = format!("plot-{}-precision-recall.svg", s.split);
    let svg = draw(&file, WIDE, |root| {
        let mut chart = frame(
            root,
            format!("Precision-recall, {} split", s.split),
            52,
            0f64..1.0,
            0f64..1.02,
        )?;
        chart
            .configure_mesh()
            .x_desc("recall")
            .y_desc("precision")
            .light_line_style(WHITE.mix(0.0))
            .draw()?;
        chart
            .draw_series(LineSeries::new(
                [(0.0, base), (1.0, base)],
                GREY.stroke_width(1),
            ))?
            .label(format!(
                "anomaly share {base:.4} (a detector without skill)"
            ))
            .legend(|(x, y)| PathElement::new([(x, y), (x + 18, y)], GREY));
        chart
            .draw_series(LineSeries::new(points, NORMAL.stroke_width(2)))?
            .label("every threshold")
            .legend(|(x, y)| PathElement::new([(x, y), (x + 18, y)], NORMAL.stroke_width(2)));
        chart
            .draw_series(std::iter::once(Circle::new(op, 6, MARK.filled())))?
            .label(format!(
                "chosen ε: recall {:.3}, precision {:.3}",
                op.0, op.1
            ))
            .legend(|(x, y)| Circle::new((x + 9, y), 5, MARK.filled()));
        legend(&mut chart, SeriesLabelPosition::LowerLeft)
    })?;
    Ok(Plot {
        file,
        title: format!("Precision-recall curve ({})", s.split),
        caption: format!(
            "Precision against recall over every threshold on the {} split; the dot is the operating point of the chosen ε (fixed on validation).",
            s.split
        ),
        svg,
    })
}

/// True-positive rate against false-positive rate, with the operating point.
pub fn roc(s: SplitFigures<'_>) -> Result<Plot> {
    let cuts = s.cuts;
    let points: Vec<(f64, f64)> = cuts
        .iter()
        .map(|cut| (fpr(&cut.c), recall(&cut.c)))
        .collect();
    let points = thin(&points, (1.0, 1.0));
    let at = s.facts.at;
    let op = (fpr(&at), recall(&at));
    let file = format!("plot-{}-roc.svg", s.split);
    let svg = draw(&file, WIDE, |root| {
        let mut chart = frame(
            root,
            format!("ROC, {} split", s.split),
            52,
            0f64..1.0,
            0f64..1.02,
        )?;
        chart
            .configure_mesh()
            .x_desc("false-positive rate")
            .y_desc("true-positive rate (recall)")
            .light_line_style(WHITE.mix(0.0))
            .draw()?;
        chart
            .draw_series(LineSeries::new(
                [(0.0, 0.0), (1.0, 1.0)],
                GREY.stroke_width(1),
            ))?
            .label("chance")
            .legend(|(x, y)| PathElement::new([(x, y), (x + 18, y)], GREY));
        chart
            .draw_series(LineSeries::new(points, NORMAL.stroke_width(2)))?
            .label("every threshold")
            .legend(|(x, y)| PathElement::new([(x, y), (x + 18, y)], NORMAL.stroke_width(2)));
        chart
            .draw_series(std::iter::once(Circle::new(op, 6, MARK.filled())))?
            .label(format!("chosen ε: FPR {:.4}, TPR {:.3}", op.0, op.1))
            .legend(|(x, y)| Circle::new((x + 9, y), 5, MARK.filled()));
        legend(&mut chart, SeriesLabelPosition::LowerRight)
    })?;
    Ok(Plot {
        file,
        title: format!("ROC curve ({})", s.split),
        caption: format!(
            "Recall against the false-positive rate over every threshold on the {} split; the dot is the chosen ε.",
            s.split
        ),
        svg,
    })
}

/// The policy's objective at every validation cut point against ln ε = −τ.
pub fn objective(policy: ThresholdPolicy, s: SplitFigures<'_>) -> Result<Plot> {
    let (name, value) = threshold::objective(policy);
    let cuts = s.cuts;
    let axis = &s.facts.axes.ln_eps;
    let xr = axis.range.clone();
    let mut points: Vec<(f64, f64)> = cuts
        .iter()
        .map(|cut| (-cut.tau, value(&cut.c)))
        .filter(|(x, _)| xr.contains(x))
        .collect();
    points.sort_by(|a, b| a.0.total_cmp(&b.0));
    let at = value(&s.facts.at);
    // A cost objective grows with its costs: values beyond the axis limit
    // (or infinite) are left out of the value axis too, and the caption says so.
    let y_within = |y: f64| y.abs() <= AXIS_LIMIT;
    let y_clipped = !y_within(at) || points.iter().any(|p| !y_within(p.1));
    points.retain(|p| y_within(p.1));
    let ymax = points
        .iter()
        .map(|p| p.1)
        .fold(if y_within(at) { at } else { 0.0 }, f64::max);
    let ymax = if ymax > 0.0 { ymax * 1.05 } else { 1.0 };
    let points = thin(&points, (xr.end - xr.start, ymax));
    let file = format!("plot-{}-objective.svg", s.split);
    let svg = draw(&file, WIDE, |root| {
        let mut chart = frame(
            root,
            format!("{name} against ln ε, {} split", s.split),
            60,
            xr.clone(),
            0f64..ymax,
        )?;
        chart
            .configure_mesh()
            .x_desc("ln ε (a row is flagged when ln p(x) < ln ε)")
            .y_desc(name.clone())
            .light_line_style(WHITE.mix(0.0))
            .draw()?;
        chart
            .draw_series(LineSeries::new(points, NORMAL.stroke_width(2)))?
            .label(format!("{name} at each threshold"))
            .legend(|(x, y)| PathElement::new([(x, y), (x + 18, y)], NORMAL.stroke_width(2)));
        chart
            .draw_series(LineSeries::new(
                // A τ beyond the axis limit is named in the legend only.
                [(-s.tau, 0.0), (-s.tau, ymax)]
                    .into_iter()
                    .filter(|p| xr.contains(&p.0)),
                MARK.stroke_width(2),
            ))?
            .label(format!("chosen ln ε = {:.4} ({name} {at:.4})", -s.tau))
            .legend(|(x, y)| PathElement::new([(x, y), (x + 18, y)], MARK.stroke_width(2)));
        legend(&mut chart, SeriesLabelPosition::LowerLeft)
    })?;
    Ok(Plot {
        file,
        title: format!("{name} against ln ε ({})", s.split),
        caption: format!(
            "The threshold policy's objective ({name}) on the {} split, with the chosen ε; the axis spans the 0.1 % to 99.9 % quantiles of −s(x). The curve is thinned: it is exact at every anomaly score and at both ends of each run of normal scores between two anomaly scores, and drawn straight across such a run.{}{}",
            s.split,
            axis.note(),
            if y_clipped {
                " Objective values that are infinite or beyond ±1e150 are left out of the value axis (they are not drawn)."
            } else {
                ""
            }
        ),
        svg,
    })
}

/// Bin counts of `v` over `r` in `bins` equal bins; values outside are not counted.
fn bin_counts(v: &[f64], r: &Range<f64>, bins: usize) -> (Vec<u64>, u64) {
    let mut counts = vec![0u64; bins];
    let mut outside = 0;
    for &x in v {
        match bin_of(x, r, bins) {
            Some(b) => counts[b] += 1,
            None => outside += 1,
        }
    }
    (counts, outside)
}

/// Score histograms of normal and anomalous rows with the threshold line.
/// Counts are log-scaled when one class outnumbers the other more than 20 to 1.
pub fn score_histogram(s: SplitFigures<'_>) -> Result<Plot> {
    let axis = &s.facts.axes.score;
    let xr = axis.range.clone();
    let bins = SCORE_BINS;
    let ((cn, on), (ca, oa)) = (&s.facts.normal, &s.facts.anomalous);
    let (on, oa) = (*on, *oa);
    let at = s.facts.at;
    let (normals, anomalies) = (at.fp + at.tn, at.tp + at.fn_);
    let (big, small) = (normals.max(anomalies), normals.min(anomalies).max(1));
    let log = big > 20 * small;
    let top = cn.iter().chain(ca).copied().max().unwrap_or(1).max(1) as f64;
    let file = format!("plot-{}-scores.svg", s.split);
    let width = (xr.end - xr.start) / bins as f64;
    let svg = draw(&file, WIDE, |root| {
        if log {
            histogram_chart(
                root,
                s,
                xr.clone(),
                (0.5f64..top * 2.0).log_scale(),
                0.5,
                width,
                cn,
                ca,
            )
        } else {
            histogram_chart(root, s, xr.clone(), 0f64..top * 1.08, 0.0, width, cn, ca)
        }
    })?;
    let outside = if on + oa > 0 {
        format!(
            " {} normal and {} anomalous rows score outside the plotted range (the 0.1 % tails) and are not drawn.",
            on, oa
        )
    } else {
        String::new()
    };
    Ok(Plot {
        file,
        title: format!("Score histogram by class ({})", s.split),
        caption: format!(
            "Counts of s(x) = −ln p(x) on the {} split for normal and anomalous rows{}; rows right of the line are flagged.{}{}",
            s.split,
            if log { ", on a logarithmic count axis because the classes are very unequal" } else { "" },
            outside,
            axis.note()
        ),
        svg,
    })
}

#[allow(clippy::too_many_arguments)]
fn histogram_chart<Y>(
    root: &Area<'_>,
    s: SplitFigures<'_>,
    xr: Range<f64>,
    y: Y,
    floor: f64,
    width: f64,
    normal: &[u64],
    anomalous: &[u64],
) -> DrawResult
where
    Y: AsRangedCoord<Value = f64>,
    Y::CoordDescType: ValueFormatter<f64>,
{
    let mut chart = frame(
        root,
        format!("Scores by class, {} split", s.split),
        60,
        xr.clone(),
        y,
    )?;
    chart
        .configure_mesh()
        .x_desc("s(x) = −ln p(x)")
        .y_desc("rows")
        .y_label_formatter(&|v| format!("{v:.0}"))
        .light_line_style(WHITE.mix(0.0))
        .draw()?;
    for (counts, color, name) in [(normal, NORMAL, "normal"), (anomalous, ANOMALY, "anomaly")] {
        chart
            .draw_series(
                counts
                    .iter()
                    .enumerate()
                    .filter(|(_, &c)| c > 0)
                    .map(|(i, &c)| {
                        let x0 = xr.start + i as f64 * width;
                        Rectangle::new(
                            [(x0, floor), (x0 + width, c as f64)],
                            color.mix(0.55).filled(),
                        )
                    }),
            )?
            .label(name)
            .legend(move |(x, y)| {
                Rectangle::new([(x, y - 5), (x + 14, y + 5)], color.mix(0.55).filled())
            });
    }
    let ytop = chart.y_range().end;
    chart
        .draw_series(LineSeries::new(
            // A τ beyond the axis limit is named in the legend only.
            [(s.tau, floor), (s.tau, ytop)]
                .into_iter()
                .filter(|p| xr.contains(&p.0)),
            MARK.stroke_width(2),
        ))?
        .label(format!("τ = {:.4}", s.tau))
        .legend(|(x, y)| PathElement::new([(x, y), (x + 18, y)], MARK.stroke_width(2)));
    legend(&mut chart, SeriesLabelPosition::UpperRight)
}

/// The density of a mixture of normal components (weight, mean, variance) at `x`.
fn mixture_pdf(components: &[(f64, f64, f64)], x: f64) -> f64 {
    components
        .iter()
        .map(|&(w, m, v)| {
            w * libm::exp(-(x - m) * (x - m) / (2.0 * v))
                / libm::sqrt(2.0 * std::f64::consts::PI * v)
        })
        .sum()
}

/// One feature's training values (after transforms) as a density histogram,
/// with the detector's fitted marginal density drawn over it. `marginal` is
/// None for a detector without per-feature parameters; the Gaussian with the
/// training mean and variance is drawn instead, and the caption says so.
pub fn feature_histogram(
    index: usize,
    name: &str,
    rows: &str,
    values: &[f64],
    marginal: Option<Vec<(f64, f64, f64)>>,
) -> Result<Plot> {
    let n = values.len().max(1) as f64;
    let (components, source) = match marginal {
        Some(c) => (c, "the chosen detector's fitted marginal density"),
        None => {
            let mean = values.iter().sum::<f64>() / n;
            let var = values.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n;
            (
                vec![(1.0, mean, var)],
                "the Gaussian with the training mean and variance (the chosen detector has no per-feature density)",
            )
        }
    };
    let axis = axis_range(values, &[]);
    let xr = axis.range.clone();
    let bins = 40;
    let width = (xr.end - xr.start) / bins as f64;
    let (counts, outside) = bin_counts(values, &xr, bins);
    let density: Vec<f64> = counts.iter().map(|&c| c as f64 / (n * width)).collect();
    let curve: Vec<(f64, f64)> = (0..=200)
        .map(|i| {
            let x = xr.start + (xr.end - xr.start) * i as f64 / 200.0;
            (x, mixture_pdf(&components, x))
        })
        .filter(|p| p.1.is_finite())
        .collect();
    let top = density
        .iter()
        .copied()
        .chain(curve.iter().map(|p| p.1))
        .fold(0.0, f64::max);
    let top = if top > 0.0 && top.is_finite() {
        top * 1.1
    } else {
        1.0
    };
    let file = format!("plot-feature-{:02}.svg", index + 1);
    let svg = draw(&file, SMALL, |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(name, ("sans-serif", 15))
            .margin(8)
            .x_label_area_size(32)
            .y_label_area_size(52)
            .build_cartesian_2d(xr.clone(), 0f64..top)?;
        chart
            .configure_mesh()
            .y_desc("density")
            .x_labels(6)
            .y_labels(5)
            .light_line_style(WHITE.mix(0.0))
            .draw()?;
        chart.draw_series(density.iter().enumerate().filter(|(_, &d)| d > 0.0).map(
            |(i, &d)| {
                let x0 = xr.start + i as f64 * width;
                Rectangle::new([(x0, 0.0), (x0 + width, d)], NORMAL.mix(0.45).filled())
            },
        ))?;
        chart.draw_series(LineSeries::new(curve, MARK.stroke_width(2)))?;
        Ok(())
    })?;
    Ok(Plot {
        file,
        title: format!("Training histogram of {name}"),
        caption: format!(
            "{name}: {rows} after transforms (bars, as a density) and {source} (line).{}{}",
            if outside > 0 {
                format!(" {outside} rows in the 0.1 % tails are not drawn.")
            } else {
                String::new()
            },
            axis.note()
        ),
        svg,
    })
}

/// One metric of one candidate with its 95 % interval, for [`intervals`].
#[derive(Debug, Clone)]
pub struct IntervalPoint {
    /// The metric, such as `precision`.
    pub metric: String,
    /// The candidate.
    pub candidate: String,
    /// Whether it is the chosen candidate (drawn in the marking colour).
    pub chosen: bool,
    /// The point value, in [0, 1].
    pub value: f64,
    /// The 95 % interval, when there is one.
    pub interval: Option<(f64, f64)>,
}

/// The card's first figure: for each metric and candidate, the point value
/// and its 95 % interval as a bar on a common 0 to 1 axis, one row each,
/// metrics in the order given. Labels (candidate names come from the spec)
/// are escaped by the SVG backend.
pub fn intervals(split: &str, points: &[IntervalPoint]) -> Result<Plot> {
    let file = format!("plot-{split}-intervals.svg");
    let rows = points.len().max(1);
    let height = 70 + 24 * rows as u32;
    let label_px: u32 = 250;
    let svg = draw(&file, (560, height), |root| {
        let mut chart = ChartBuilder::on(root)
            .caption(format!("95 % intervals, {split} split"), ("sans-serif", 16))
            .margin(10)
            .margin_left(label_px)
            .x_label_area_size(30)
            .build_cartesian_2d(0f64..1.0, 0f64..rows as f64)?;
        chart
            .configure_mesh()
            .disable_y_mesh()
            .disable_y_axis()
            .x_labels(6)
            .light_line_style(WHITE.mix(0.0))
            .draw()?;
        for (i, p) in points.iter().enumerate() {
            let y = rows as f64 - i as f64 - 0.5;
            let colour = if p.chosen { MARK } else { NORMAL };
            if let Some((lo, hi)) = p.interval {
                chart.draw_series(std::iter::once(PathElement::new(
                    [(lo.clamp(0.0, 1.0), y), (hi.clamp(0.0, 1.0), y)],
                    colour.stroke_width(3),
                )))?;
            }
            chart.draw_series(std::iter::once(Circle::new(
                (p.value.clamp(0.0, 1.0), y),
                5,
                colour.filled(),
            )))?;
            let (_, py) = chart.backend_coord(&(0.0, y));
            let label = format!(
                "{} · {}{}",
                p.metric,
                p.candidate,
                if p.chosen { " (chosen)" } else { "" }
            );
            root.draw(&Text::new(
                label,
                (8, py - 6),
                ("sans-serif", 13).into_font().color(&BLACK),
            ))?;
        }
        Ok(())
    })?;
    Ok(Plot {
        file,
        title: format!("Intervals ({split})"),
        caption: format!(
            "Each metric of each candidate on the {split} split: the dot is the value, the bar \
             its 95 % interval (Wilson score for precision and recall, the stratified bootstrap \
             for F1); the chosen detector is drawn in red."
        ),
        svg,
    })
}

#[cfg(test)]
mod tests {
    /// Both ways to a quantile give the value of a plain selection, on
    /// values with repeats, both zeros and infinities (the total order
    /// puts −0 before +0). Common practice, no source: nearest rank.
    #[test]
    fn quantile_ways_agree_with_selection() {
        use rand_chacha::rand_core::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(9);
        for n in [1usize, 2, 15, 16, 17, 100, 1000, 20_000] {
            let v: Vec<f64> = (0..n)
                .map(|_| match rng.next_u32() % 10 {
                    0 => 0.0,
                    1 => -0.0,
                    2 => f64::INFINITY,
                    3 => f64::NEG_INFINITY,
                    4 => 1.5,
                    _ => (rng.next_u64() >> 11) as f64 / 2f64.powi(40) - 1000.0,
                })
                .collect();
            for q in [0.0, 0.001, 0.01, 0.05, 0.5, 0.95, 0.99, 0.999, 1.0] {
                let mut c = v.clone();
                let k = ((n - 1) as f64 * q).round() as usize;
                let want = *c.select_nth_unstable_by(k, f64::total_cmp).1;
                assert_eq!(
                    super::quantile(&v, q).to_bits(),
                    want.to_bits(),
                    "n {n} q {q}"
                );
            }
        }
        for x in [0.0, -0.0, 1.0, -1.0, f64::MAX, f64::MIN, f64::INFINITY] {
            assert_eq!(
                super::f64_of_key(super::key_of_f64(x)).to_bits(),
                x.to_bits()
            );
        }
    }

    use super::*;

    /// The figures' facts made as an engine makes them (the kept scores'
    /// values at the axis ranks, here by a full sort; the histogram counts
    /// by [`bin_of`] on the range fixed first) equal those made from the
    /// scores, and the ln ε axis equals the axis of the negated scores (the
    /// objective's definition). Invented scores with repeats, both zeros,
    /// infinities and values beyond the limit.
    #[test]
    fn facts_from_order_statistics_equal_facts_from_scores() {
        use rand_chacha::rand_core::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(29);
        for n in [0usize, 1, 2, 3, 17, 500, 5000] {
            let v: Vec<f64> = (0..n)
                .map(|_| match rng.next_u32() % 12 {
                    0 => 0.0,
                    1 => -0.0,
                    2 => f64::INFINITY,
                    3 => 1e200,
                    4 => 2.5,
                    _ => (rng.next_u64() >> 11) as f64 / 2f64.powi(45) - 20.0,
                })
                .collect();
            let y: Vec<bool> = (0..n).map(|_| rng.next_u32() % 5 == 0).collect();
            for tau in [2.5, 0.0, 1e300] {
                let mut kept: Vec<f64> = v
                    .iter()
                    .copied()
                    .filter(|&x| within_axis_limit(x))
                    .collect();
                kept.sort_by(f64::total_cmp);
                let values: Vec<f64> = axis_ranks(kept.len()).iter().map(|&k| kept[k]).collect();
                let axes = ScoreAxes::new((n - kept.len()) as u64, &values, tau);
                let r = axes.score_range();
                let mut bins = [
                    (vec![0u64; SCORE_BINS], 0u64),
                    (vec![0u64; SCORE_BINS], 0u64),
                ];
                for (x, a) in v.iter().zip(&y) {
                    let class = &mut bins[usize::from(*a)];
                    match bin_of(*x, &r, SCORE_BINS) {
                        Some(b) => class.0[b] += 1,
                        None => class.1 += 1,
                    }
                }
                let [normal, anomalous] = bins;
                let at = Confusion::at(&v, &y, Threshold(tau));
                let engine = ScoreFacts::new(at, axes, normal, anomalous).unwrap();
                let facts = ScoreFacts::of(&v, &y, tau);
                assert_eq!(engine, facts, "n {n} tau {tau}");
                let neg: Vec<f64> = v.iter().map(|x| -x).collect();
                assert_eq!(facts.axes.ln_eps, axis_range(&neg, &[-tau]), "n {n}");
                assert_eq!(facts.axes.score, axis_range(&v, &[tau]), "n {n}");
            }
        }
    }

    #[test]
    fn thinning_keeps_ends_and_drops_crowded_points() {
        let pts: Vec<(f64, f64)> = (0..=10_000).map(|i| (i as f64 / 10_000.0, 0.5)).collect();
        let t = thin(&pts, (1.0, 1.0));
        assert_eq!(t.first(), Some(&(0.0, 0.5)));
        assert_eq!(t.last(), Some(&(1.0, 0.5)));
        assert!(t.len() <= 502, "{}", t.len());
    }

    #[test]
    fn the_same_numbers_give_the_same_svg_and_data_text_is_escaped() {
        let v: Vec<f64> = (0..1000).map(|i| (i as f64 * 0.37).sin()).collect();
        let a = feature_histogram(0, "<script>alert(1)</script>", "rows", &v, None).unwrap();
        let b = feature_histogram(0, "<script>alert(1)</script>", "rows", &v, None).unwrap();
        assert_eq!(a.svg, b.svg);
        assert!(!a.svg.contains("<script>"));
        assert!(a.svg.contains("&lt;script&gt;"));
    }

    /// Issue 25: a score or feature of 1e155 or more (or an infinite one, or
    /// a single distinct value) once made plotters' key-point search spin
    /// forever. Each figure is drawn on its own thread and must be back
    /// within a bound far above its usual few milliseconds.
    #[test]
    fn every_figure_draws_in_bounded_time_whatever_the_values() {
        let normal = [10.1, 10.4, 9.8, 11.2, 10.0, 9.5];
        let sets: Vec<(Vec<f64>, f64)> = vec![
            (
                normal.iter().copied().chain([1e200, 16.0, 17.0]).collect(),
                15.0,
            ),
            (
                normal.iter().copied().chain([1e300, 1e308]).collect(),
                1e300,
            ),
            (
                normal
                    .iter()
                    .copied()
                    .chain([f64::INFINITY, 16.0])
                    .collect(),
                f64::INFINITY,
            ),
            (vec![f64::NEG_INFINITY, 3.0, f64::INFINITY, 4.0], 3.5),
            (vec![1e155; 8], 1e155),
            (vec![1e300, 1e300 * (1.0 + f64::EPSILON), 1e300], 1e300),
            (vec![-1e308, 1e308, 0.0, 1.0], 0.5),
            (vec![7.25; 5], 7.25),
            (vec![1e-320, 2e-320, 3e-320], 2e-320),
            (vec![f64::INFINITY; 4], f64::INFINITY),
        ];
        for (scores, tau) in sets {
            let handle = std::thread::spawn(move || {
                let labels: Vec<bool> = (0..scores.len()).map(|i| i % 3 == 2).collect();
                let cuts = threshold::cuts(&scores, &labels);
                let raw = SplitScores {
                    split: "validation",
                    scores: &scores,
                    is_anomaly: &labels,
                    tau,
                    cuts: &cuts,
                };
                let facts = raw.facts();
                let s = raw.with(&facts);
                let mut captions = vec![
                    precision_recall(s).unwrap().caption,
                    roc(s).unwrap().caption,
                    objective(ThresholdPolicy::MaxF1, s).unwrap().caption,
                    score_histogram(s).unwrap().caption,
                ];
                // Costs near the largest float make the cost objective
                // infinite: its value axis is bounded the same way.
                let costly = ThresholdPolicy::MinCost {
                    missed_anomaly: 1.7e308,
                    false_alarm: 1.7e308,
                };
                let cost = objective(costly, s).unwrap().caption;
                for marginal in [None, Some(vec![(1.0, 10.0, 1.0)])] {
                    captions.push(
                        feature_histogram(0, "a", "rows", &scores, marginal)
                            .unwrap()
                            .caption,
                    );
                }
                captions.push(cost);
                (scores, captions)
            });
            let started = std::time::Instant::now();
            while !handle.is_finished() {
                assert!(
                    started.elapsed() < std::time::Duration::from_secs(60),
                    "a figure did not finish within 60 s"
                );
                std::thread::sleep(std::time::Duration::from_millis(20));
            }
            let (scores, captions) = handle.join().unwrap();
            // Every set has two rows of one class, whose cost is infinite.
            assert!(captions[6].contains("value axis"), "{}", captions[6]);
            let huge = scores.iter().any(|v| v.abs() > AXIS_LIMIT);
            // The objective, the score and the feature histograms say so
            // when values were left out of the range.
            for c in &captions[2..6] {
                assert_eq!(c.contains("beyond ±1e150"), huge, "{scores:?}: {c}");
            }
        }
    }

    #[test]
    fn a_standard_normal_density_at_zero() {
        // 1/√(2π) = 0.3989422804014327 (any handbook table of the normal density).
        assert!((mixture_pdf(&[(1.0, 0.0, 1.0)], 0.0) - 0.398_942_280_401_432_7).abs() < 1e-15);
    }
}
