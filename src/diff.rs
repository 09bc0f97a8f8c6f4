//! `anomark diff OLD NEW`: what changed between two run directories and
//! whether a difference in test performance is real.
//!
//! Reads the two run records, spec copies and score files; computes nothing
//! but the comparison. When both runs opened the same test split (equal test
//! manifest hashes), the chosen detectors' decisions are paired row by row:
//! McNemar's exact test on the discordant pairs (McNemar 1947; the exact form
//! is a two-sided binomial test with p = ½) and a seeded paired bootstrap
//! interval for the difference in F1 (new − old), resampling the test rows
//! with replacement within each label.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::Path;

use serde_json::Value;
use statrs::distribution::{Binomial, DiscreteCDF};

use crate::error::{Error, Result};
use crate::metrics::{Confusion, Interval, Metrics, Threshold};

/// McNemar's exact two-sided p-value for `b` and `c` discordant pairs:
/// min(1, 2 · P(X ≤ min(b, c))) with X ~ Binomial(b + c, ½).
pub fn mcnemar_exact(b: u64, c: u64) -> f64 {
    let n = b + c;
    if n == 0 {
        return 1.0;
    }
    let k = b.min(c);
    let cdf = Binomial::new(0.5, n).expect("valid binomial").cdf(k);
    (2.0 * cdf).min(1.0)
}

/// The paired comparison of two runs' decisions on the same test rows.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct Paired {
    /// Test rows paired.
    pub rows: usize,
    /// Rows the old detector got right and the new one wrong.
    pub old_right_new_wrong: u64,
    /// Rows the old detector got wrong and the new one right.
    pub old_wrong_new_right: u64,
    /// McNemar's exact two-sided p-value.
    pub mcnemar_exact_p: f64,
    /// Test F1 of the old and the new chosen detector.
    pub f1: [Option<f64>; 2],
    /// 95 % paired stratified bootstrap interval for F1(new) − F1(old).
    pub f1_difference_95: Option<Interval>,
}

/// Everything `diff` reports.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct Diff {
    /// Inputs whose path or hash differ: path → [old blake3, new blake3].
    pub inputs: BTreeMap<String, [Option<String>; 2]>,
    /// Spec fields that differ (dotted paths).
    pub spec_fields: Vec<String>,
    /// Splits whose manifest hash differs, with counts old → new.
    pub splits: BTreeMap<String, [Option<crate::split::Counts>; 2]>,
    /// Rows by content hash: `old split -> new split` → rows that moved so
    /// (`absent` for a row only in one run), when both runs' data is at hand.
    pub rows: Option<BTreeMap<String, usize>>,
    /// Why rows were not compared, when they were not.
    pub rows_not_compared: Option<String>,
    /// Whether the feature sets (with fitted transforms) differ.
    pub features_changed: bool,
    /// Per candidate present in both: what changed.
    pub candidates: BTreeMap<String, CandidateDiff>,
    /// Candidates only in the old or only in the new run.
    pub only_in: [Vec<String>; 2],
    /// The chosen candidate, old and new.
    pub chosen: [String; 2],
    /// The paired test comparison, when both runs opened the same test split.
    pub paired: Option<Paired>,
    /// Why there is no paired comparison, when there is none.
    pub no_pairing: Option<String>,
}

/// Changes of one candidate.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct CandidateDiff {
    /// Whether the fitted parameters differ.
    pub params_changed: bool,
    /// τ old and new.
    pub tau: [f64; 2],
    /// Metric → [old, new, new − old] on validation.
    pub validation: BTreeMap<String, [Option<f64>; 3]>,
    /// The same on test (when both opened it).
    pub test: BTreeMap<String, [Option<f64>; 3]>,
}

const METRICS: [&str; 6] = [
    "precision",
    "recall",
    "f1",
    "average-precision",
    "roc-auc",
    "mcc",
];

use crate::record::{read_run, CandidateRecord, RunRecord, RUN_JSON};

fn differing_paths(a: &Value, b: &Value, at: &str, out: &mut Vec<String>) {
    match (a, b) {
        (Value::Object(x), Value::Object(y)) => {
            let keys: std::collections::BTreeSet<&String> = x.keys().chain(y.keys()).collect();
            for k in keys {
                let p = if at.is_empty() {
                    k.clone()
                } else {
                    format!("{at}.{k}")
                };
                match (x.get(k), y.get(k)) {
                    (Some(v), Some(w)) => differing_paths(v, w, &p, out),
                    _ => out.push(p),
                }
            }
        }
        _ if a != b => out.push(at.to_string()),
        _ => {}
    }
}

/// A metric of [`METRICS`] by its recorded name.
fn metric(m: &Metrics, name: &str) -> Option<f64> {
    match name {
        "precision" => m.precision,
        "recall" => m.recall,
        "f1" => m.f1,
        "average-precision" => m.average_precision,
        "roc-auc" => m.roc_auc,
        "mcc" => m.mcc,
        _ => None,
    }
}

fn metric_deltas(a: &Metrics, b: &Metrics) -> BTreeMap<String, [Option<f64>; 3]> {
    METRICS
        .iter()
        .map(|m| {
            let (x, y) = (metric(a, m), metric(b, m));
            let d = x.zip(y).map(|(x, y)| y - x);
            (m.to_string(), [x, y, d])
        })
        .collect()
}

/// Whether two recorded values write the same JSON (the record's notion of
/// equal: a NaN and a null are one).
fn same_json<T: serde::Serialize>(a: &T, b: &T) -> bool {
    serde_json::to_value(a).ok() == serde_json::to_value(b).ok()
}

/// Test rows of scores.csv: id → (label, score of `column`); for a run
/// on an engine, of its scores' Parquet parts (keyed by id, or by the row's
/// place among all the inputs' rows, as scores.csv's `row`).
fn test_scores(dir: &Path, column: &str) -> Result<BTreeMap<String, (bool, f64)>> {
    let p = dir.join("scores.csv");
    if !p.exists() {
        let folder = dir.join(crate::protocol::report::SCORES_PARTS);
        if folder.is_dir() {
            return parts_test_scores(dir, column);
        }
    }
    let text = std::fs::read_to_string(&p).map_err(|e| Error::io(&p, "reading", e))?;
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap_or("").split(',').collect();
    let k = header
        .iter()
        .position(|h| *h == column)
        .ok_or_else(|| Error::Output {
            path: p.clone(),
            message: format!("no score column `{column}`"),
        })?;
    let mut out = BTreeMap::new();
    for l in lines {
        let f: Vec<&str> = l.split(',').collect();
        if f.get(1) == Some(&"test") {
            let s = f
                .get(k)
                .and_then(|v| v.parse::<f64>().ok())
                .unwrap_or(f64::NAN);
            out.insert(f[0].to_string(), (f[2] == "1", s));
        }
    }
    Ok(out)
}

/// [`test_scores`] of a run whose scores are Parquet parts.
fn parts_test_scores(dir: &Path, column: &str) -> Result<BTreeMap<String, (bool, f64)>> {
    let folder = dir.join(crate::protocol::report::SCORES_PARTS);
    let mut names: Vec<String> = std::fs::read_dir(&folder)
        .map_err(|e| Error::io(&folder, "reading", e))?
        .filter_map(|e| e.ok())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".parquet"))
        .map(|n| format!("{}/{n}", crate::protocol::report::SCORES_PARTS))
        .collect();
    names.sort();
    let refs: Vec<&String> = names.iter().collect();
    let parts = crate::protocol::recompute::read_parts(dir, &refs)?;
    let k = parts
        .candidates
        .iter()
        .position(|c| c == column)
        .ok_or_else(|| Error::Output {
            path: folder.clone(),
            message: format!("no score column `{column}`"),
        })?;
    let run = read_run(dir)?;
    let firsts: Vec<u64> = run
        .inputs
        .iter()
        .scan(0u64, |at, i| {
            let first = *at;
            *at += i.rows as u64;
            Some(first)
        })
        .collect();
    let mut out = BTreeMap::new();
    for (id, part, f, r, a, s) in parts.rows {
        if part == 2 {
            let key = id
                .unwrap_or_else(|| (firsts.get(f as usize).copied().unwrap_or(0) + r).to_string());
            out.insert(key, (a, s[k]));
        }
    }
    Ok(out)
}

/// Each content hash with its split per row, recomputed from the run's own
/// spec copy and the data it names, which must still have the recorded
/// hashes (split assignment only: nothing is fitted or scored).
fn rows_of(dir: &Path) -> Result<BTreeMap<crate::audit::hash::ContentHash, Vec<&'static str>>> {
    let spec = crate::protocol::recorded_spec_path(dir)?;
    let copy = dir.join(crate::protocol::SPEC_COPY);
    let bytes = std::fs::read(&copy).map_err(|e| Error::io(&copy, "reading", e))?;
    let plan = crate::spec::parse(&spec, bytes)?;
    let data = crate::data::load(&plan)?;
    let run = read_run(dir)?;
    let recorded: Vec<&str> = run
        .inputs
        .iter()
        .map(|i| i.digest.blake3.as_str())
        .collect();
    let now: Vec<&str> = data
        .files
        .iter()
        .map(|f| f.digest.blake3.as_str())
        .collect();
    if recorded != now {
        return Err(Error::Output {
            path: dir.to_path_buf(),
            message: "its inputs changed since the run".into(),
        });
    }
    let (hashes, s) = crate::protocol::ingest::hash_and_split(
        &plan,
        &data,
        &crate::progress::Progress::hidden(),
    )?;
    let mut out: BTreeMap<_, Vec<&'static str>> = BTreeMap::new();
    for r in &s.train {
        out.entry(hashes[r.0 as usize]).or_default().push("train");
    }
    for r in &s.validation {
        out.entry(hashes[r.0 as usize])
            .or_default()
            .push("validation");
    }
    for h in s.test.contents(&hashes) {
        out.entry(h).or_default().push("test");
    }
    Ok(out)
}

fn row_moves(old: &Path, new: &Path) -> std::result::Result<BTreeMap<String, usize>, String> {
    let a = rows_of(old).map_err(|e| format!("the old run's rows could not be recomputed: {e}"))?;
    let b = rows_of(new).map_err(|e| format!("the new run's rows could not be recomputed: {e}"))?;
    let mut moves = BTreeMap::new();
    let keys: std::collections::BTreeSet<_> = a.keys().chain(b.keys()).collect();
    for k in keys {
        let (x, y) = (
            a.get(k).map_or(&[][..], Vec::as_slice),
            b.get(k).map_or(&[][..], Vec::as_slice),
        );
        for i in 0..x.len().max(y.len()) {
            let from = x.get(i).copied().unwrap_or("absent");
            let to = y.get(i).copied().unwrap_or("absent");
            if from != to {
                *moves.entry(format!("{from} -> {to}")).or_insert(0) += 1;
            }
        }
    }
    Ok(moves)
}

/// Compares two run directories.
pub fn diff(old: &Path, new: &Path) -> Result<Diff> {
    let (a, b) = (read_run(old)?, read_run(new)?);
    let (path_a, path_b) = (old.join(RUN_JSON), new.join(RUN_JSON));
    let (xa, xb) = (a.chosen(&path_a)?, b.chosen(&path_b)?);
    let by_path = |r: &RunRecord| -> BTreeMap<String, String> {
        r.inputs
            .iter()
            .map(|i| (i.path.clone(), i.digest.blake3.clone()))
            .collect()
    };
    let (ia, ib) = (by_path(&a), by_path(&b));
    let mut inputs = BTreeMap::new();
    for k in ia.keys().chain(ib.keys()) {
        if ia.get(k) != ib.get(k) {
            inputs.insert(k.clone(), [ia.get(k).cloned(), ib.get(k).cloned()]);
        }
    }
    let spec = |d: &Path| -> Value {
        std::fs::read_to_string(d.join(crate::protocol::SPEC_COPY))
            .ok()
            .and_then(|t| serde_saphyr::from_str::<Value>(&t).ok())
            .unwrap_or(Value::Null)
    };
    let mut spec_fields = Vec::new();
    differing_paths(&spec(old), &spec(new), "", &mut spec_fields);
    let mut splits = BTreeMap::new();
    for p in ["train", "validation", "test"] {
        if a.split.manifest_blake3.get(p) != b.split.manifest_blake3.get(p) {
            splits.insert(
                p.to_string(),
                [
                    a.split.counts.get(p).copied(),
                    b.split.counts.get(p).copied(),
                ],
            );
        }
    }
    let cands = |r: &RunRecord| -> BTreeMap<String, CandidateRecord> {
        r.candidates
            .iter()
            .map(|c| (c.name.clone(), c.clone()))
            .collect()
    };
    let (ca, cb) = (cands(&a), cands(&b));
    let mut candidates = BTreeMap::new();
    for (name, x) in &ca {
        if let Some(y) = cb.get(name) {
            candidates.insert(
                name.clone(),
                CandidateDiff {
                    params_changed: !same_json(&x.params, &y.params),
                    tau: [x.tau, y.tau],
                    validation: metric_deltas(&x.validation, &y.validation),
                    test: match (&x.test, &y.test) {
                        (Some(s), Some(t)) => metric_deltas(s, t),
                        _ => BTreeMap::new(),
                    },
                },
            );
        }
    }
    let only_in = [
        ca.keys()
            .filter(|k| !cb.contains_key(*k))
            .cloned()
            .collect(),
        cb.keys()
            .filter(|k| !ca.contains_key(*k))
            .cloned()
            .collect(),
    ];
    let same_test = a.split.manifest_blake3.get("test") == b.split.manifest_blake3.get("test");
    let both_open = a.test_opened && b.test_opened;
    let (paired, no_pairing) = if !same_test {
        (
            None,
            Some("the runs were evaluated on different test rows".to_string()),
        )
    } else if !both_open {
        (
            None,
            Some("at least one run kept the test split sealed".to_string()),
        )
    } else {
        (Some(pair(old, new, xa, xb)?), None)
    };
    let (rows, rows_not_compared) = if splits.is_empty() {
        (Some(BTreeMap::new()), None)
    } else {
        match row_moves(old, new) {
            Ok(m) => (Some(m), None),
            Err(why) => (None, Some(why)),
        }
    };
    Ok(Diff {
        inputs,
        spec_fields,
        splits,
        rows,
        rows_not_compared,
        features_changed: !same_json(&a.feature_sets, &b.feature_sets),
        candidates,
        only_in,
        chosen: [a.selection.chosen.clone(), b.selection.chosen.clone()],
        paired,
        no_pairing,
    })
}

fn pair(old: &Path, new: &Path, x: &CandidateRecord, y: &CandidateRecord) -> Result<Paired> {
    let (sa, sb) = (test_scores(old, &x.name)?, test_scores(new, &y.name)?);
    let (ta, tb) = (x.tau, y.tau);
    // (label, old flag, new flag) per paired row, in id order.
    let rows: Vec<(bool, bool, bool)> = sa
        .iter()
        .filter_map(|(id, (label, s))| {
            sb.get(id)
                .map(|(_, t)| (*label, Threshold(ta).flags(*s), Threshold(tb).flags(*t)))
        })
        .collect();
    let (mut b01, mut c10) = (0u64, 0u64);
    for (label, fa, fb) in &rows {
        match (fa == label, fb == label) {
            (true, false) => b01 += 1,
            (false, true) => c10 += 1,
            _ => {}
        }
    }
    let f1 = |rows: &[(bool, bool, bool)], w: &[u32], pick: fn(&(bool, bool, bool)) -> bool| {
        let mut c = Confusion::default();
        for (r, k) in rows.iter().zip(w) {
            let k = u64::from(*k);
            match (pick(r), r.0) {
                (true, true) => c.tp += k,
                (true, false) => c.fp += k,
                (false, true) => c.fn_ += k,
                (false, false) => c.tn += k,
            }
        }
        c.f1()
    };
    let ones = vec![1u32; rows.len()];
    let (fa, fb) = (f1(&rows, &ones, |r| r.1), f1(&rows, &ones, |r| r.2));
    let pos: Vec<usize> = (0..rows.len()).filter(|&i| rows[i].0).collect();
    let neg: Vec<usize> = (0..rows.len()).filter(|&i| !rows[i].0).collect();
    let mut diffs: Vec<f64> = Vec::new();
    if !pos.is_empty() && !neg.is_empty() {
        for rep in 0..1000u64 {
            let mut rng = crate::rng::seeded(1, rep);
            let mut w = vec![0u32; rows.len()];
            for stratum in [&pos, &neg] {
                for _ in 0..stratum.len() {
                    w[stratum[crate::rng::below(&mut rng, stratum.len() as u64) as usize]] += 1;
                }
            }
            if let (Some(x), Some(y)) = (f1(&rows, &w, |r| r.1), f1(&rows, &w, |r| r.2)) {
                diffs.push(y - x);
            }
        }
    }
    diffs.sort_by(f64::total_cmp);
    let q = |p: f64| {
        let pos = p * (diffs.len() - 1) as f64;
        let (lo, hi) = (pos.floor() as usize, pos.ceil() as usize);
        diffs[lo] + (pos - lo as f64) * (diffs[hi] - diffs[lo])
    };
    Ok(Paired {
        rows: rows.len(),
        old_right_new_wrong: b01,
        old_wrong_new_right: c10,
        mcnemar_exact_p: mcnemar_exact(b01, c10),
        f1: [fa, fb],
        f1_difference_95: (!diffs.is_empty()).then(|| Interval {
            low: q(0.025),
            high: q(0.975),
        }),
    })
}

fn num(v: Option<f64>) -> String {
    v.map_or("n/a".into(), |v| format!("{v:.4}"))
}

/// The diff as readable text.
pub fn render_text(d: &Diff) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "chosen: {} -> {}", d.chosen[0], d.chosen[1]);
    if d.inputs.is_empty() {
        let _ = writeln!(s, "inputs: unchanged");
    }
    for (p, [x, y]) in &d.inputs {
        let _ = writeln!(
            s,
            "input {p}: {} -> {}",
            x.as_deref().unwrap_or("absent"),
            y.as_deref().unwrap_or("absent")
        );
    }
    let _ = writeln!(
        s,
        "spec fields changed: {}",
        if d.spec_fields.is_empty() {
            "none".into()
        } else {
            d.spec_fields.join(", ")
        }
    );
    if d.splits.is_empty() {
        let _ = writeln!(s, "splits: identical rows");
    }
    for (p, [x, y]) in &d.splits {
        // Counts as compact JSON (`null` when a run lacks the split).
        let j = |c: &Option<crate::split::Counts>| serde_json::to_string(c).unwrap_or_default();
        let _ = writeln!(s, "split {p}: rows changed ({} -> {})", j(x), j(y));
    }
    if let Some(m) = &d.rows {
        for (k, n) in m {
            let _ = writeln!(s, "rows {k}: {n}");
        }
    }
    if let Some(why) = &d.rows_not_compared {
        let _ = writeln!(s, "rows: not compared ({why})");
    }
    let _ = writeln!(
        s,
        "features: {}",
        if d.features_changed {
            "changed"
        } else {
            "unchanged"
        }
    );
    for (name, c) in &d.candidates {
        let _ = writeln!(
            s,
            "{name}: parameters {}, tau {} -> {}",
            if c.params_changed {
                "changed"
            } else {
                "unchanged"
            },
            crate::record::fmt_f64(c.tau[0]),
            crate::record::fmt_f64(c.tau[1])
        );
        for (label, m) in [("validation", &c.validation), ("test", &c.test)] {
            for (k, [x, y, dlt]) in m {
                let _ = writeln!(
                    s,
                    "  {label} {k}: {} -> {} ({})",
                    num(*x),
                    num(*y),
                    dlt.map_or("n/a".into(), |v| format!("{v:+.4}"))
                );
            }
        }
    }
    for (side, names) in ["only in old", "only in new"].iter().zip(&d.only_in) {
        if !names.is_empty() {
            let _ = writeln!(s, "{side}: {}", names.join(", "));
        }
    }
    match (&d.paired, &d.no_pairing) {
        (Some(p), _) => {
            let _ = writeln!(
                s,
                "paired test comparison over {} rows: old right/new wrong {}, old wrong/new right {}, McNemar exact p = {:.4}; F1 {} -> {}, difference 95% CI {}",
                p.rows,
                p.old_right_new_wrong,
                p.old_wrong_new_right,
                p.mcnemar_exact_p,
                num(p.f1[0]),
                num(p.f1[1]),
                p.f1_difference_95.map_or("n/a".into(), |i| format!("{:+.4} to {:+.4}", i.low, i.high))
            );
        }
        (None, Some(why)) => {
            let _ = writeln!(s, "paired test comparison: none ({why})");
        }
        _ => {}
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    /// REFERENCES.md section 6: Agresti (1990) presidential approval table,
    /// b = 150, c = 86: exact p = 3.7159361395713866e-05 (statsmodels 0.15.0
    /// `mcnemar(exact=True)`, equal to scipy's binomtest); and the small
    /// case b = 1, c = 7: p = 0.0703125 exactly.
    #[test]
    fn mcnemar_exact_matches_the_reference() {
        let p = mcnemar_exact(150, 86);
        assert!(
            (p - 3.7159361395713866e-05).abs() / 3.7159361395713866e-05 < 1e-9,
            "{p}"
        );
        assert!((mcnemar_exact(1, 7) - 0.0703125).abs() < 1e-12);
        assert_eq!(mcnemar_exact(0, 0), 1.0);
        assert_eq!(mcnemar_exact(5, 5), 1.0);
    }
}
