//! The dry run behind `anomark check`: validates the spec and the data and
//! previews the split, without fitting any detector.
//!
//! It reports every problem it finds rather than stopping at the first, the
//! counts each split would get by label, duplicate rows, and a summary of each
//! feature on the would-be training rows with a hint where a feature is far
//! from Gaussian. Labels of validation and test rows are only counted; no
//! feature value of theirs is summarised.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::Path;

use crate::audit::leak::Part;
use crate::data::{self, Dataset};
use crate::error::{Error, Result};
use crate::features;
use crate::record::fmt_f64;
use crate::spec::{self, MissingPolicy, Plan};
use crate::split::Counts;

/// |skewness| above which a feature is called far from Gaussian: the usual
/// rule of thumb for a highly skewed sample (Bulmer 1979, "Principles of
/// Statistics"; from memory).
pub const SKEW_LIMIT: f64 = 1.0;

/// One feature's summary on the would-be training rows.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct FeatureSummary {
    /// Feature set.
    pub set: String,
    /// Feature name (after its declared transforms).
    pub name: String,
    /// Minimum.
    pub min: f64,
    /// Maximum.
    pub max: f64,
    /// Mean.
    pub mean: f64,
    /// Standard deviation (divisor n).
    pub sd: f64,
    /// Sample skewness m₃ / m₂^1.5 (as scipy.stats.skew with bias=True).
    pub skewness: f64,
    /// Share of normal rows whose value of this feature is missing.
    pub share_missing: f64,
    /// What to try when the feature is far from Gaussian.
    pub hint: Option<String>,
}

/// What `check` found.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct CheckReport {
    /// The spec file name.
    pub spec: String,
    /// Input files: path, rows, blake3.
    pub inputs: Vec<(String, usize, String)>,
    /// The split method.
    pub split_method: Option<String>,
    /// Counts each split would get, by label.
    pub counts: Option<BTreeMap<String, Counts>>,
    /// The counts the fractions ask for.
    pub requested: Option<BTreeMap<String, Counts>>,
    /// Rows sharing their content with another row.
    pub rows_with_duplicates: Option<usize>,
    /// Feature summaries on the would-be train split.
    pub features: Vec<FeatureSummary>,
    /// Every problem, as its message.
    pub problems: Vec<String>,
}

fn by_name(c: [Counts; 3]) -> BTreeMap<String, Counts> {
    Part::ALL
        .iter()
        .map(|p| (p.name().to_string(), c[*p as usize]))
        .collect()
}

/// Moments of a sample: (mean, sd, skewness), divisor n.
pub fn moments(v: &[f64]) -> (f64, f64, f64) {
    let n = v.len() as f64;
    let mean = v.iter().sum::<f64>() / n;
    let m2 = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / n;
    let m3 = v.iter().map(|x| (x - mean).powi(3)).sum::<f64>() / n;
    let skew = if m2 > 0.0 { m3 / m2.powf(1.5) } else { 0.0 };
    (mean, m2.sqrt(), skew)
}

fn hint(skew: f64, min: f64) -> Option<String> {
    if skew.abs() <= SKEW_LIMIT {
        return None;
    }
    let side = if skew > 0.0 { "right" } else { "left" };
    let try_this = if skew > 0.0 && min > 0.0 {
        "try `log` or `box-cox`"
    } else if skew > 0.0 && min > -1.0 {
        "try `log1p` or `yeo-johnson`"
    } else {
        "try `yeo-johnson`"
    };
    Some(format!("{side}-skewed (skewness {skew:.2}); {try_this}"))
}

/// Runs the dry run. `Err` only for a spec that cannot be read or parsed.
pub fn check(spec_path: &Path) -> Result<CheckReport> {
    let plan = spec::load(spec_path)?;
    let mut report = CheckReport {
        spec: spec_path
            .file_name()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default(),
        inputs: vec![],
        split_method: None,
        counts: None,
        requested: None,
        rows_with_duplicates: None,
        features: vec![],
        problems: vec![],
    };
    let inspection = match data::inspect(&plan) {
        Ok(i) => i,
        Err(e) => {
            report.problems.push(e.to_string());
            return Ok(report);
        }
    };
    let data::Inspection {
        data,
        has_missing,
        missing_per_column,
        problems,
        missing,
    } = inspection;
    report.inputs = data
        .files
        .iter()
        .map(|f| (f.shown.clone(), f.rows, f.digest.blake3.clone()))
        .collect();
    let value_problems = !problems.is_empty();
    report
        .problems
        .extend(problems.iter().map(|e| e.to_string()));
    if plan.missing == MissingPolicy::Refuse {
        report
            .problems
            .extend(missing.iter().map(|e| e.to_string()));
    }
    if value_problems {
        return Ok(report);
    }
    // Rows with missing values are refused or dropped before the split, so the
    // preview leaves them out either way.
    let normals = data.is_anomaly.iter().filter(|a| !**a).count().max(1);
    let missing_share: Vec<f64> = (0..missing_per_column.len())
        .map(|j| {
            (0..data.len())
                .filter(|&i| !data.is_anomaly[i] && data.x[(i, j)].is_nan())
                .count() as f64
                / normals as f64
        })
        .collect();
    let data = data::drop_rows(data, &has_missing, &plan);
    preview(&plan, &data, &missing_share, &mut report);
    Ok(report)
}

fn preview(plan: &Plan, data: &Dataset, missing_share: &[f64], report: &mut CheckReport) {
    let splits = match crate::protocol::ingest::hash_and_split(
        plan,
        data,
        &crate::progress::Progress::hidden(),
    ) {
        Ok((_, s)) => s,
        Err(e) => {
            report.problems.push(e.to_string());
            return;
        }
    };
    report.split_method = Some(splits.report.method.to_string());
    report.counts = Some(by_name(splits.report.counts));
    report.requested = splits.report.requested.map(by_name);
    report.rows_with_duplicates = Some(splits.report.rows_with_duplicates);
    if let spec::ThresholdPolicy::Conformal {
        max_false_positive_rate: a,
    } = plan.threshold
    {
        let normals = splits.report.counts[Part::Validation as usize].normal;
        if let Err(e) = crate::conformal::check_level(a, normals) {
            report.problems.push(e.to_string());
        }
    }
    for set in &plan.feature_sets {
        let fitted = match features::fit(set, data, &splits.train) {
            Ok(f) => f,
            Err(e) => {
                report.problems.push(e.to_string());
                continue;
            }
        };
        let x = match fitted.apply(data, &splits.train) {
            Ok(x) => x,
            Err(e) => {
                report.problems.push(e.to_string());
                continue;
            }
        };
        for (j, f) in set.features.iter().enumerate() {
            let v: Vec<f64> = x.column(j).to_vec();
            let (mean, sd, skewness) = moments(&v);
            let min = v.iter().copied().fold(f64::INFINITY, f64::min);
            let max = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            if min == max {
                let e = crate::rules::zero_variance("", vec![f.name.clone()]);
                report.problems.push(
                    Error::InFeatureSet {
                        set: set.name.clone(),
                        source: Box::new(e),
                    }
                    .to_string(),
                );
            }
            let share_missing = match f.input {
                spec::FeatureInput::Column(a) => missing_share[a],
                spec::FeatureInput::Ratio(a, b)
                | spec::FeatureInput::Difference(a, b)
                | spec::FeatureInput::Product(a, b) => missing_share[a].max(missing_share[b]),
            };
            report.features.push(FeatureSummary {
                set: set.name.clone(),
                name: f.name.clone(),
                min,
                max,
                mean,
                sd,
                skewness,
                share_missing,
                hint: hint(skewness, min),
            });
        }
    }
}

fn num(v: f64) -> String {
    if v != 0.0 && (v.abs() >= 1e6 || v.abs() < 1e-3) {
        format!("{v:.3e}")
    } else {
        format!("{v:.4}")
    }
}

/// The report as text for a terminal.
pub fn render_text(r: &CheckReport) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "spec: {}", r.spec);
    for (p, rows, b) in &r.inputs {
        let _ = writeln!(s, "input: {p} ({rows} rows, blake3 {b})");
    }
    if let (Some(m), Some(c)) = (&r.split_method, &r.counts) {
        let _ = writeln!(s, "split ({m}):");
        let _ = writeln!(
            s,
            "  {:<11}{:>9}{:>9}  requested",
            "split", "normal", "anomaly"
        );
        for p in Part::ALL {
            let k = c[p.name()];
            let req = r
                .requested
                .as_ref()
                .map(|q| format!("{}/{}", q[p.name()].normal, q[p.name()].anomaly))
                .unwrap_or_else(|| "-".into());
            let _ = writeln!(
                s,
                "  {:<11}{:>9}{:>9}  {req}",
                p.name(),
                k.normal,
                k.anomaly
            );
        }
    }
    if let Some(d) = r.rows_with_duplicates {
        let _ = writeln!(
            s,
            "duplicates: {d} rows share their content with another row"
        );
    }
    if !r.features.is_empty() {
        let _ = writeln!(s, "features on the would-be train split:");
        for f in &r.features {
            let _ = writeln!(
                s,
                "  {}/{}: min {} max {} mean {} sd {} skewness {} missing {}%{}",
                f.set,
                f.name,
                num(f.min),
                num(f.max),
                num(f.mean),
                num(f.sd),
                num(f.skewness),
                fmt_f64((f.share_missing * 1000.0).round() / 10.0),
                f.hint
                    .as_ref()
                    .map(|h| format!("  [{h}]"))
                    .unwrap_or_default()
            );
        }
    }
    if r.counts.is_none() && !r.problems.is_empty() {
        let _ = writeln!(
            s,
            "split and feature summaries: not shown until the problems are fixed"
        );
    }
    if r.problems.is_empty() {
        let _ = writeln!(s, "problems: none");
    } else {
        let _ = writeln!(s, "problems: {}", r.problems.len());
        for p in &r.problems {
            let _ = writeln!(s, "  - {}", p.replace('\n', "\n    "));
        }
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Formula check (no source): for [1, 2, 3, 10] the mean is 4, the central
    /// moments with divisor n are m₂ = 12.5 and m₃ = 45, so the skewness is
    /// 45 / 12.5^1.5 = 1.0182337649086284.
    #[test]
    fn skewness_by_hand() {
        let (mean, sd, skew) = moments(&[1.0, 2.0, 3.0, 10.0]);
        assert_eq!(mean, 4.0);
        assert!((sd - 12.5f64.sqrt()).abs() < 1e-15);
        assert!((skew - 1.0182337649086284).abs() < 1e-12, "{skew}");
    }

    #[test]
    fn hints_name_a_transform() {
        assert_eq!(hint(0.3, 1.0), None);
        assert!(hint(2.0, 0.5).unwrap().contains("`box-cox`"));
        assert!(hint(2.0, -3.0).unwrap().contains("`yeo-johnson`"));
        assert!(hint(-1.5, 2.0).unwrap().starts_with("left-skewed"));
    }
}
