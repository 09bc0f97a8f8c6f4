//! The run record (`run.json`) and the one place where numbers are formatted
//! for text outputs.
//!
//! Everything here is data: the protocol fills it, the writers serialise it.
//! Maps are `BTreeMap`s so that key order never depends on hashing, and floats
//! are written as the shortest decimal that reads back to the same double
//! (serde_json's and [`fmt_f64`]'s rule), so the bytes are the same everywhere.

use std::collections::BTreeMap;

use crate::audit::hash::FileDigest;
use crate::data::{Dropped, Format};
use crate::detect::Params;
use crate::features::FittedFeatures;
use crate::metrics::Metrics;
use crate::spec::{MissingPolicy, ThresholdPolicy};
use crate::split::{Counts, SplitReport};

/// run.json format version.
pub const FORMAT: u32 = 1;

/// The tool name and version, as recorded.
pub fn tool() -> String {
    format!("anomark {}", env!("CARGO_PKG_VERSION"))
}

pub use crate::float::{fmt_f64, push_f64};

/// The record of one run.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct RunRecord {
    /// Format version of this record.
    pub format: u32,
    /// The tool and version.
    pub tool: String,
    /// The spec.
    pub spec: SpecRecord,
    /// The git commit of the spec's repository and whether its tree was
    /// dirty (null outside a repository).
    pub provenance: Option<crate::audit::provenance::Provenance>,
    /// Every input file.
    pub inputs: Vec<InputRecord>,
    /// The label column and its values (null when the label is implied by
    /// separate normal and anomaly sources).
    pub label: Option<LabelRecord>,
    /// The source columns that row content hashes cover, in order.
    pub content_columns: Vec<String>,
    /// The missing-value policy.
    pub missing_values: MissingPolicy,
    /// Rows left out for missing values.
    pub dropped_rows: Dropped,
    /// Every feature set with its fitted transforms.
    pub feature_sets: Vec<FittedFeatures>,
    /// The split.
    pub split: SplitRecord,
    /// Whether this run opened the test split (`--open-test`).
    pub test_opened: bool,
    /// Test rows by label (counted even when sealed).
    pub test_counts: Counts,
    /// The ledger's record of openings of this test split (final runs only).
    pub test_openings: Option<TestOpenings>,
    /// The threshold policy, as declared.
    pub threshold_policy: ThresholdPolicy,
    /// The bootstrap behind the F1, AP and AUC intervals.
    pub bootstrap: crate::spec::BootstrapPlan,
    /// How the detector was chosen.
    pub selection: SelectionRecord,
    /// Every candidate.
    pub candidates: Vec<CandidateRecord>,
    /// The chosen candidate's calibration scores, for conformal p-values
    /// when scoring new data. Always written; absent (read as `None`) only in
    /// runs recorded before conformal p-values.
    pub calibration: Option<CalibrationRecord>,
    /// What a scored batch's drift is measured against. Always written;
    /// absent (read as `None`) only in runs recorded before drift reports.
    pub drift_reference: Option<DriftReference>,
    /// The scores digest (`audit::hash::scores_digest`): every scored row's
    /// split, file and row, label and each candidate's score, whichever
    /// way they are written (scores.csv in process, Parquet parts on an
    /// engine). Always written; absent (read as `None`) only in runs
    /// recorded before it.
    #[serde(default)]
    pub scores_digest: Option<String>,
    /// The engine the run's rows were read, split and summarised on
    /// (`--engine`: `local` or the cluster's `df://HOST:PORT`); absent for a
    /// run in this process. Every other field is the same on every engine.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub engine: Option<String>,
    /// The only wall-clock field: when the run started and how long it took.
    /// Null with `--no-wall-clock`; everything else is reproducible to the byte.
    pub wall_clock: Option<WallClock>,
}

/// The spec file.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct SpecRecord {
    /// The spec's file name.
    pub file: String,
    /// blake3 of its bytes.
    pub blake3: String,
    /// The spec's path relative to the run directory (`/` separators), where
    /// `verify --data` and `diff` look for it by default.
    pub path_from_run: Option<String>,
}

/// `to` relative to the directory `from` (both made absolute, symlinks not
/// resolved), with `/` separators.
pub fn relative_path(from: &std::path::Path, to: &std::path::Path) -> Option<String> {
    let (from, to) = (
        std::path::absolute(from).ok()?,
        std::path::absolute(to).ok()?,
    );
    let (a, b): (Vec<_>, Vec<_>) = (from.components().collect(), to.components().collect());
    let common = a.iter().zip(&b).take_while(|(x, y)| x == y).count();
    if common == 0 {
        return None;
    }
    let mut parts: Vec<String> = vec!["..".to_string(); a.len() - common];
    parts.extend(
        b[common..]
            .iter()
            .map(|c| c.as_os_str().to_string_lossy().into_owned()),
    );
    Some(parts.join("/"))
}

/// One input file.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct InputRecord {
    /// The path relative to the spec's directory.
    pub path: String,
    /// CSV or Parquet.
    pub format: Format,
    /// Data rows read.
    pub rows: usize,
    /// Size and hash.
    #[serde(flatten)]
    pub digest: FileDigest,
}

/// The label column.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct LabelRecord {
    /// Column name.
    pub column: String,
    /// Value meaning normal.
    pub normal: String,
    /// Value meaning anomaly.
    pub anomaly: String,
}

/// The split, with one manifest hash per split.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct SplitRecord {
    /// How the split came out.
    #[serde(flatten)]
    pub report: SplitReport,
    /// Split name → the counts the fractions ask for (not for `from-column`).
    pub requested: Option<BTreeMap<String, Counts>>,
    /// Split name → the counts obtained, by label.
    pub counts: BTreeMap<String, Counts>,
    /// Split name → blake3 of its manifest (see README, "Content hashes").
    pub manifest_blake3: BTreeMap<String, String>,
}

/// The selection rule and its outcome.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct SelectionRecord {
    /// The validation metric that ranks candidates.
    pub metric: crate::spec::SelectionMetric,
    /// The rule, in words.
    pub rule: String,
    /// The chosen candidate's name.
    pub chosen: String,
}

/// One candidate detector.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct CandidateRecord {
    /// Candidate name (`set/detector` with several feature sets).
    pub name: String,
    /// The feature set.
    pub feature_set: String,
    /// The detector.
    pub detector: String,
    /// Free parameters (the tie rule's notion of simpler); null for an
    /// external command, whose parameters anomark cannot count (it loses
    /// every tie on this rule).
    pub parameter_count: Option<usize>,
    /// Fitted parameters.
    pub params: Params,
    /// Flag iff s(x) > τ.
    pub tau: f64,
    /// ln ε = −τ.
    pub ln_epsilon: f64,
    /// Whether the policy's constraint is met on validation (unmet
    /// candidates are never selected).
    pub threshold_met: bool,
    /// Why not, with the closest achievable point.
    pub threshold_note: Option<String>,
    /// Validation metrics at τ.
    pub validation: Metrics,
    /// Test metrics at τ (null while the test split is sealed).
    pub test: Option<Metrics>,
    /// `true` for the chosen candidate. The test numbers of every candidate,
    /// chosen or not, were computed after selection and played no part in it.
    pub chosen: bool,
}

/// The calibration set of conformal p-values: the chosen candidate's scores
/// of the validation normal rows (never used to fit it), sorted ascending.
/// p(x) = (1 + #{scores ≥ s(x)}) / (n + 1). Beyond 30,000 rows only the
/// highest 20,000 and 10,000 evenly spaced order statistics below them are
/// kept, with their ranks ([`crate::conformal::Thinning`]).
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct CalibrationRecord {
    /// The candidate whose scores these are.
    pub candidate: String,
    /// n, the number of validation normal rows.
    pub validation_normals: usize,
    /// Their scores (the kept ones), ascending (`total_cmp` order).
    pub sorted_scores: Vec<f64>,
    /// The kept scores' ranks (from 1, ascending, the last n); absent when
    /// every score is kept.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub kept_ranks: Option<Vec<usize>>,
}

impl CalibrationRecord {
    /// The record of `calibration`, the scores of candidate `candidate`.
    pub fn of(candidate: &str, calibration: &crate::conformal::Calibration) -> Self {
        CalibrationRecord {
            candidate: candidate.to_string(),
            validation_normals: calibration.len(),
            sorted_scores: calibration.sorted().to_vec(),
            kept_ranks: calibration.ranks().map(<[usize]>::to_vec),
        }
    }

    /// The calibration this record keeps; `None` when its scores are not
    /// sorted, hold a NaN, or its ranks do not fit its count.
    pub fn calibration(&self) -> Option<crate::conformal::Calibration> {
        crate::conformal::Calibration::from_kept(
            self.validation_normals,
            self.sorted_scores.clone(),
            self.kept_ranks.clone(),
        )
    }
}

/// The chosen candidate's feature values on a bounded systematic sample of
/// the rows its feature figures show, for per-feature drift in `score`.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct DriftReference {
    /// The feature set.
    pub feature_set: String,
    /// Which rows were sampled, in words.
    pub rows: String,
    /// Sampled rows (at most [`DRIFT_SAMPLE_ROWS`]).
    pub sample_rows: usize,
    /// The validation false-positive rate of the chosen candidate: the flag
    /// rate expected of a batch of normal rows.
    pub validation_false_positive_rate: Option<f64>,
    /// One entry per feature, in the feature set's order.
    pub features: Vec<FeatureReference>,
}

/// At most this many rows are kept for drift (a systematic sample in
/// content-hash order above): enough for a two-sample Kolmogorov-Smirnov
/// statistic with a resolution of 1/2000, and run.json stays small (not
/// measured; picked for size).
pub const DRIFT_SAMPLE_ROWS: usize = 2000;

/// One feature's reference for drift.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct FeatureReference {
    /// Feature name.
    pub name: String,
    /// Mean of the sample.
    pub mean: f64,
    /// Standard deviation of the sample (n − 1 denominator).
    pub sd: f64,
    /// The sample's values, ascending.
    pub sorted_sample: Vec<f64>,
}

impl FeatureReference {
    /// From a feature's sampled values.
    pub fn of(name: &str, values: &[f64]) -> Self {
        let n = values.len() as f64;
        let mean = if values.is_empty() {
            0.0
        } else {
            values.iter().sum::<f64>() / n
        };
        let sd = if values.len() < 2 {
            0.0
        } else {
            (values.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / (n - 1.0)).sqrt()
        };
        let mut sorted_sample = values.to_vec();
        sorted_sample.sort_by(f64::total_cmp);
        FeatureReference {
            name: name.into(),
            mean,
            sd,
            sorted_sample,
        }
    }
}

/// How often the test split has been opened, from the ledger.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct TestOpenings {
    /// The ledger file's name.
    pub ledger: String,
    /// Openings of this test manifest, this one included.
    pub count: usize,
    /// The distinct spec hashes that opened it, sorted.
    pub spec_blake3: Vec<String>,
}

/// Wall-clock facts, the record's only non-reproducible field.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct WallClock {
    /// Start of the run, UTC, RFC 3339.
    pub started_utc: String,
    /// Elapsed seconds, to the millisecond.
    pub seconds: f64,
}

/// The run record's file name in a run directory.
pub const RUN_JSON: &str = "run.json";

/// Reads a run directory's `run.json` as a [`RunRecord`]: the one reader
/// behind `verify --data`, `score`, the refit of a chosen detector and
/// `diff`. A missing file is an I/O error; a field that is missing or of the
/// wrong type is an output error (exit 4) naming `run.json` and the field's
/// path, never a default.
pub fn read_run(dir: &std::path::Path) -> crate::error::Result<RunRecord> {
    let p = dir.join(RUN_JSON);
    let b = std::fs::read(&p).map_err(|e| crate::error::Error::io(&p, "reading", e))?;
    parse_run(&p, &b)
}

/// Parses the bytes of `run.json` (read from `path`, which errors name) as a
/// [`RunRecord`], with [`read_run`]'s errors. For a caller that has the
/// bytes already (to check their hash first).
pub fn parse_run(path: &std::path::Path, bytes: &[u8]) -> crate::error::Result<RunRecord> {
    let de = &mut serde_json::Deserializer::from_slice(bytes);
    let rec: RunRecord = serde_path_to_error::deserialize(de).map_err(|e| {
        let at = e.path().to_string();
        let inner = e.into_inner();
        crate::error::Error::Output {
            path: path.to_path_buf(),
            message: if at == "." || inner.is_syntax() || inner.is_eof() {
                format!("not a run record: {inner}")
            } else {
                format!("not a run record: field `{at}`: {inner}")
            },
        }
    })?;
    if rec.format != FORMAT {
        return Err(crate::error::Error::Output {
            path: path.to_path_buf(),
            message: format!(
                "not a run record: field `format` is {}, this version reads {FORMAT}",
                rec.format
            ),
        });
    }
    Ok(rec)
}

impl RunRecord {
    /// The chosen candidate (exactly one is marked `chosen`; its name is
    /// `selection.chosen`). Errors name `path`, the run.json read.
    pub fn chosen(&self, path: &std::path::Path) -> crate::error::Result<&CandidateRecord> {
        let mut marked = self.candidates.iter().filter(|c| c.chosen);
        match (marked.next(), marked.next()) {
            (Some(c), None) if c.name == self.selection.chosen => Ok(c),
            (Some(_), None) => Err(crate::error::Error::Output {
                path: path.to_path_buf(),
                message: format!(
                    "not a run record: the candidate marked `chosen` is not `selection.chosen` (`{}`)",
                    self.selection.chosen
                ),
            }),
            _ => Err(crate::error::Error::Output {
                path: path.to_path_buf(),
                message: "not a run record: not exactly one candidate is marked `chosen`".into(),
            }),
        }
    }

    /// The fitted feature set named `name`.
    pub fn feature_set(
        &self,
        path: &std::path::Path,
        name: &str,
    ) -> crate::error::Result<&FittedFeatures> {
        self.feature_sets
            .iter()
            .find(|s| s.set == name)
            .ok_or_else(|| crate::error::Error::Output {
                path: path.to_path_buf(),
                message: format!("not a run record: no feature set `{name}` in `feature-sets`"),
            })
    }
}

/// Formats seconds since the Unix epoch as RFC 3339 UTC (to the second).
pub fn rfc3339(unix_seconds: u64) -> String {
    let days = (unix_seconds / 86_400) as i64;
    let secs = unix_seconds % 86_400;
    // Civil date from days since 1970-01-01 (H. Hinnant's algorithm).
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let y = yoe + era * 400;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = if m <= 2 { y + 1 } else { y };
    format!(
        "{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}Z",
        secs / 3600,
        secs / 60 % 60,
        secs % 60
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rfc3339_known_instants() {
        // 2000-03-01 is 11017 days after the epoch (common practice, no source:
        // checked by `date -u -d @951868800`).
        assert_eq!(rfc3339(0), "1970-01-01T00:00:00Z");
        assert_eq!(rfc3339(951_868_800), "2000-03-01T00:00:00Z");
        assert_eq!(rfc3339(1_798_761_599), "2026-12-31T23:59:59Z");
    }

    #[test]
    fn floats_round_trip() {
        for v in [0.1, 1.0 / 3.0, -42.819383059492445, 1e-300, 6.0] {
            assert_eq!(fmt_f64(v).parse::<f64>().unwrap(), v);
        }
        assert_eq!(fmt_f64(6.0), "6");
    }

    /// push_f64 writes a shortest round-trip decimal in plain notation: the
    /// value reads back to the same bits and has as many characters as
    /// fmt_f64's text (usually the same text). Checked on special values,
    /// powers of ten around the notation switch, random score-like values and
    /// random bit patterns (seeded).
    #[test]
    fn push_f64_is_shortest_and_round_trips() {
        use rand_chacha::rand_core::{Rng, SeedableRng};
        let mut differ = 0;
        let mut check = |v: f64| {
            let mut s = String::from("x");
            push_f64(&mut s, v);
            let (got, want) = (&s[1..], fmt_f64(v));
            if v.is_finite() {
                assert!(!got.contains('e'), "{got}");
                assert_eq!(got.parse::<f64>().unwrap().to_bits(), v.to_bits(), "{got}");
                assert_eq!(got.len(), want.len(), "{got} vs {want}");
            } else {
                assert_eq!(got, want);
            }
            differ += usize::from(got != want);
        };
        for v in [
            0.0,
            -0.0,
            1.0,
            -1.0,
            6.0,
            0.1,
            1e15,
            1e16,
            1e-5,
            9.999e-6,
            f64::MAX,
        ] {
            check(v);
        }
        for v in [
            f64::MIN_POSITIVE,
            5e-324,
            f64::NAN,
            f64::INFINITY,
            -f64::INFINITY,
        ] {
            check(v);
        }
        for e in -30..30 {
            let p = 10f64.powi(e);
            for v in [p, -p, p * 1.5, p.next_up(), p.next_down()] {
                check(v);
            }
        }
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        for _ in 0..200_000 {
            let u = (rng.next_u64() >> 11) as f64 / (1u64 << 53) as f64;
            check(-200.0 + 400.0 * u);
            check(f64::from_bits(rng.next_u64()));
        }
        // Ties are rare: a handful in 400,000 values.
        assert!(differ < 100, "{differ}");
    }

    /// A thinned calibration survives run.json: its kept scores, their
    /// `kept-ranks` and n come back as the same calibration; a whole one
    /// writes no `kept-ranks` (older records read unchanged).
    #[test]
    fn a_calibration_record_keeps_its_ranks_through_json() {
        use crate::conformal::{Calibration, Thinning};
        let scores: Vec<f64> = (0..500).map(|i| f64::from((i * 37) % 101) / 8.0).collect();
        for (thinning, thinned) in [
            (Thinning { tail: 30, body: 20 }, true),
            (Thinning::DEFAULT, false),
        ] {
            let c = Calibration::thinned(scores.clone(), thinning);
            let rec = CalibrationRecord::of("c1", &c);
            let text = serde_json::to_string(&rec).unwrap();
            assert_eq!(text.contains("\"kept-ranks\""), thinned, "{text}");
            let back: CalibrationRecord = serde_json::from_str(&text).unwrap();
            assert_eq!(back.validation_normals, 500);
            assert_eq!(back.calibration(), Some(c));
        }
    }
}
