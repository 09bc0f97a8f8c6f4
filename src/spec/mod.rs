//! The spec: parsing the YAML into [`RawSpec`] and resolving it into a checked [`Plan`].
//!
//! This module reads the spec file and nothing else: no data file is opened
//! here. Every problem it finds is an [`Error::Spec`] with file, line, column
//! and field path. Code after this stage sees only [`Plan`].

mod raw;

pub use raw::{
    AnomalyFractions, DetectorKind, NormalFractions, RawCard, RawData, RawLabel, RawProtocol,
    RawSpec, RawSplit, Scalar, ThresholdPolicy,
};

use std::cell::RefCell;
use std::path::{Path, PathBuf};

use serde_saphyr::Spanned;

use crate::error::{Error, Location, Result};

/// The spec format version this release reads.
pub const FORMAT: u32 = 1;

/// A split seed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, serde::Serialize)]
pub struct Seed(pub u64);

/// A column name together with where the spec names it.
#[derive(Debug, Clone)]
pub struct Column {
    /// The column name.
    pub name: String,
    /// Where the spec names it.
    pub at: Location,
    /// The field path, such as `data.features[2]`.
    pub field: String,
}

/// How rows are assigned to splits, resolved.
#[derive(Debug, Clone)]
pub enum SplitPlan {
    /// Seeded stratified split with exact counts.
    Protocol {
        /// The seed.
        seed: Seed,
        /// Normal fractions train, validation, test.
        normal: [f64; 3],
        /// Anomaly fractions validation, test.
        anomaly: [f64; 2],
    },
    /// The split is read from a column.
    FromColumn(Column),
}

/// The card's text, resolved.
#[derive(Debug, Clone, serde::Serialize)]
pub struct CardText {
    /// Title.
    pub title: String,
    /// Owner.
    pub owner: String,
    /// Intended use.
    pub intended_use: String,
    /// Out-of-scope uses.
    pub out_of_scope_uses: Vec<String>,
    /// The safety caution, present when the spec declares a safety-relevant use.
    pub safety_caution: Option<String>,
}

/// The default safety caution (common practice, no source).
pub const DEFAULT_SAFETY_CAUTION: &str =
    "This detector is a screening aid. It is not a substitute \
for the inspections and tests that the applicable codes require, nor for licensed engineering \
judgement; a row it does not flag is not thereby shown to be safe.";

/// The resolved, checked spec.
#[derive(Debug, Clone)]
pub struct Plan {
    /// The spec file as named on the command line.
    pub spec_path: PathBuf,
    /// The spec file's exact bytes (hashed into the run record).
    pub spec_bytes: Vec<u8>,
    /// The data file, resolved against the spec's directory.
    pub data_path: PathBuf,
    /// The data path exactly as written in the spec (recorded; never absolute unless written so).
    pub data_path_as_written: String,
    /// The label column.
    pub label: Column,
    /// The text value meaning normal.
    pub normal_value: String,
    /// The text value meaning anomaly.
    pub anomaly_value: String,
    /// The optional id column.
    pub id_column: Option<Column>,
    /// The feature columns, in order.
    pub features: Vec<Column>,
    /// The split.
    pub split: SplitPlan,
    /// Candidate detectors, in spec order, without repeats.
    pub detectors: Vec<DetectorKind>,
    /// The threshold policy.
    pub threshold: ThresholdPolicy,
    /// Card text.
    pub card: CardText,
    /// Default output directory, resolved against the spec's directory.
    pub output: Option<PathBuf>,
}

impl Plan {
    /// The feature names, in order.
    pub fn feature_names(&self) -> Vec<String> {
        self.features.iter().map(|c| c.name.clone()).collect()
    }
}

/// Reads and resolves the spec at `path`.
pub fn load(path: &Path) -> Result<Plan> {
    let bytes = std::fs::read(path).map_err(|e| Error::io(path, "reading spec", e))?;
    parse(path, bytes)
}

/// Parses and resolves spec `bytes` that were read from `path`.
pub fn parse(path: &Path, bytes: Vec<u8>) -> Result<Plan> {
    let text = match std::str::from_utf8(&bytes) {
        Ok(t) => t,
        Err(e) => {
            let (line, column) = line_col_of_byte(&bytes, e.valid_up_to());
            return Err(Error::Spec {
                at: Location {
                    file: path.to_path_buf(),
                    line,
                    column,
                },
                field: String::new(),
                message: "the spec is not valid UTF-8".into(),
                line_text: String::new(),
            });
        }
    };
    let raw = parse_raw(path, text)?;
    resolve(path, text, &bytes, raw)
}

fn line_col_of_byte(bytes: &[u8], offset: usize) -> (usize, usize) {
    let before = &bytes[..offset.min(bytes.len())];
    let line = before.iter().filter(|&&b| b == b'\n').count() + 1;
    let column = before.iter().rev().take_while(|&&b| b != b'\n').count() + 1;
    (line, column)
}

/// Limits on what a spec may make the parser do. A spec is a few dozen lines;
/// these bounds are generous for that and stop alias bombs cold
/// (picked for safety, not measured).
fn options() -> serde_saphyr::Options {
    let mut alias_limits = serde_saphyr::options::AliasLimits::default();
    alias_limits.max_total_replayed_events = 10_000;
    alias_limits.max_replay_stack_depth = 16;
    alias_limits.max_alias_expansions_per_anchor = 100;
    serde_saphyr::options! {
        budget: Some(serde_saphyr::Budget::default()),
        alias_limits: alias_limits,
        duplicate_keys: serde_saphyr::options::DuplicateKeyPolicy::Error,
        strict_booleans: true,
        with_snippet: false,
    }
}

/// Parses YAML text into a [`RawSpec`], turning the parser's error into a located spec error.
pub fn parse_raw(path: &Path, text: &str) -> Result<RawSpec> {
    let failed_path = RefCell::new(String::new());
    let result = serde_saphyr::with_deserializer_from_str_with_options(text, options(), |de| {
        serde_path_to_error::deserialize(de).map_err(|e| {
            *failed_path.borrow_mut() = e.path().to_string();
            e.into_inner()
        })
    });
    result.map_err(|e| {
        let (line, column) = e
            .location()
            .map(|l| (l.line() as usize, l.column() as usize))
            .filter(|&(l, _)| l > 0)
            .unwrap_or((1, 1));
        let field = clean_path(&failed_path.into_inner());
        spec_error(path, text, line, column, field, bare_message(&e))
    })
}

/// The field path without the `value` segments that [`Spanned`] wrappers add.
fn clean_path(path: &str) -> String {
    if path == "." {
        return String::new();
    }
    path.split('.')
        .filter(|seg| *seg != "value")
        .map(|seg| seg.strip_prefix("value").unwrap_or(seg))
        .collect::<Vec<_>>()
        .join(".")
        .replace(".[", "[")
}

/// The parser's message without its own position suffix: ours is printed in front.
fn bare_message(e: &serde_saphyr::Error) -> String {
    let full = e.to_string();
    let mut msg = full.lines().next().unwrap_or("").trim().to_string();
    for marker in [" at line ", " at position "] {
        if let Some(i) = msg.rfind(marker) {
            msg.truncate(i);
        }
    }
    let msg = msg.trim_end_matches('.').to_string();
    // Serde spells "unknown field `x`, expected one of ..." already in our style.
    if msg.is_empty() {
        "the spec could not be parsed".into()
    } else {
        msg
    }
}

fn spec_error(
    path: &Path,
    text: &str,
    line: usize,
    column: usize,
    field: String,
    message: String,
) -> Error {
    let line_text = text
        .lines()
        .nth(line.saturating_sub(1))
        .unwrap_or("")
        .to_string();
    Error::Spec {
        at: Location {
            file: path.to_path_buf(),
            line,
            column,
        },
        field,
        message,
        line_text,
    }
}

struct Resolver<'a> {
    path: &'a Path,
    text: &'a str,
}

impl Resolver<'_> {
    fn at<T>(&self, s: &Spanned<T>) -> (usize, usize) {
        let l = s.referenced;
        (l.line() as usize, l.column() as usize)
    }

    fn err<T>(&self, s: &Spanned<T>, field: &str, message: String) -> Error {
        let (line, column) = self.at(s);
        spec_error(self.path, self.text, line, column, field.into(), message)
    }

    fn column(&self, s: &Spanned<String>, field: String) -> Result<Column> {
        let name = s.value.trim();
        if name.is_empty() {
            return Err(self.err(s, &field, "a column name must not be empty".into()));
        }
        let (line, column) = self.at(s);
        Ok(Column {
            name: s.value.clone(),
            at: Location {
                file: self.path.to_path_buf(),
                line,
                column,
            },
            field,
        })
    }

    fn fractions<T>(&self, s: &Spanned<T>, field: &str, named: &[(&str, f64)]) -> Result<()> {
        for (name, v) in named {
            if !(v.is_finite() && (0.0..=1.0).contains(v)) {
                return Err(self.err(
                    s,
                    &format!("{field}.{name}"),
                    format!("a fraction must lie between 0 and 1, found `{v}`"),
                ));
            }
        }
        let sum: f64 = named.iter().map(|(_, v)| v).sum();
        // Tolerance for decimal fractions such as 0.6 + 0.2 + 0.2 that do not sum
        // to exactly 1 in binary.
        if (sum - 1.0).abs() > 1e-9 {
            return Err(self.err(
                s,
                field,
                format!("the fractions must sum to 1, they sum to `{sum}`"),
            ));
        }
        Ok(())
    }
}

/// Checks the meaning of a parsed spec and fills in defaults.
pub fn resolve(path: &Path, text: &str, bytes: &[u8], raw: RawSpec) -> Result<Plan> {
    let r = Resolver { path, text };
    if raw.format.value != FORMAT {
        return Err(r.err(
            &raw.format,
            "format",
            format!(
                "this anomark reads spec format `{FORMAT}`, the spec declares `{}`",
                raw.format.value
            ),
        ));
    }
    let base = path.parent().unwrap_or(Path::new(""));

    let data = &raw.data;
    if data.path.value.trim().is_empty() {
        return Err(r.err(&data.path, "data.path", "the data path is empty".into()));
    }
    let data_path = base.join(&data.path.value);
    let label = r.column(&data.label.column, "data.label.column".into())?;
    let normal_value = data.label.normal.value.as_text();
    let anomaly_value = data.label.anomaly.value.as_text();
    if normal_value == anomaly_value {
        return Err(r.err(
            &data.label.anomaly,
            "data.label.anomaly",
            format!("the anomaly value `{anomaly_value}` equals the normal value"),
        ));
    }
    let id_column = match &data.id_column {
        Some(s) => Some(r.column(s, "data.id-column".into())?),
        None => None,
    };
    if data.features.value.is_empty() {
        return Err(r.err(
            &data.features,
            "data.features",
            "at least one feature column is needed".into(),
        ));
    }
    let mut features: Vec<Column> = Vec::new();
    for (i, f) in data.features.value.iter().enumerate() {
        let c = r.column(f, format!("data.features[{i}]"))?;
        if features.iter().any(|g| g.name == c.name) {
            return Err(r.err(f, &c.field, format!("feature `{}` is listed twice", c.name)));
        }
        if c.name == label.name {
            return Err(r.err(
                f,
                &c.field,
                format!("`{}` is the label column and cannot be a feature", c.name),
            ));
        }
        if id_column.as_ref().is_some_and(|id| id.name == c.name) {
            return Err(r.err(
                f,
                &c.field,
                format!("`{}` is the id column and cannot be a feature", c.name),
            ));
        }
        features.push(c);
    }

    let split = match &raw.split {
        RawSplit::Protocol(p) => {
            let normal = match &p.normal {
                Some(s) => {
                    let v = s.value;
                    r.fractions(
                        s,
                        "split.protocol.normal",
                        &[
                            ("train", v.train),
                            ("validation", v.validation),
                            ("test", v.test),
                        ],
                    )?;
                    [v.train, v.validation, v.test]
                }
                None => [0.6, 0.2, 0.2],
            };
            let anomaly = match &p.anomaly {
                Some(s) => {
                    let v = s.value;
                    r.fractions(
                        s,
                        "split.protocol.anomaly",
                        &[("validation", v.validation), ("test", v.test)],
                    )?;
                    [v.validation, v.test]
                }
                None => [0.5, 0.5],
            };
            SplitPlan::Protocol {
                seed: Seed(p.seed),
                normal,
                anomaly,
            }
        }
        RawSplit::FromColumn(s) => {
            let c = r.column(s, "split.from-column".into())?;
            for other in std::iter::once(&label)
                .chain(features.iter())
                .chain(id_column.iter())
            {
                if other.name == c.name {
                    return Err(r.err(
                        s,
                        "split.from-column",
                        format!("`{}` is already used as {}", c.name, other.field),
                    ));
                }
            }
            SplitPlan::FromColumn(c)
        }
    };

    if raw.detectors.value.is_empty() {
        return Err(r.err(
            &raw.detectors,
            "detectors",
            "at least one candidate detector is needed".into(),
        ));
    }
    let mut detectors = Vec::new();
    for (i, d) in raw.detectors.value.iter().enumerate() {
        if detectors.contains(d) {
            return Err(r.err(
                &raw.detectors,
                &format!("detectors[{i}]"),
                format!("detector `{}` is listed twice", crate::detect::name(*d)),
            ));
        }
        detectors.push(*d);
    }

    let card = &raw.card;
    if card.title.value.trim().is_empty() {
        return Err(r.err(&card.title, "card.title", "the card title is empty".into()));
    }
    let safety_caution = if card.safety_relevant {
        Some(
            card.safety_caution
                .clone()
                .unwrap_or_else(|| DEFAULT_SAFETY_CAUTION.to_string()),
        )
    } else {
        None
    };

    Ok(Plan {
        spec_path: path.to_path_buf(),
        spec_bytes: bytes.to_vec(),
        data_path,
        data_path_as_written: data.path.value.clone(),
        label,
        normal_value,
        anomaly_value,
        id_column,
        features,
        split,
        detectors,
        threshold: raw.threshold,
        card: CardText {
            title: card.title.value.clone(),
            owner: card.owner.clone(),
            intended_use: card.intended_use.clone(),
            out_of_scope_uses: card.out_of_scope_uses.clone(),
            safety_caution,
        },
        output: raw.output.as_ref().map(|o| base.join(&o.value)),
    })
}

/// The JSON Schema of the spec, as pretty JSON with a trailing newline.
pub fn schema_json() -> String {
    let schema = schemars::schema_for!(RawSpec);
    let mut s = serde_json::to_string_pretty(&schema).expect("a schema serialises");
    s.push('\n');
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = "format: 1
data:
  path: d.csv
  label:
    column: y
    normal: ok
    anomaly: bad
  features: [a, b]
split:
  protocol:
    seed: 7
detectors: [independent-gaussian, multivariate-gaussian]
card:
  title: t
  owner: o
  intended-use: u
";

    fn err(yaml: &str) -> (usize, usize, String, String) {
        match parse(Path::new("spec.yaml"), yaml.as_bytes().to_vec()) {
            Err(Error::Spec {
                at, field, message, ..
            }) => (at.line, at.column, field, message),
            other => panic!("expected a spec error, got {other:?}"),
        }
    }

    /// One located spec error: the YAML, where it points, and a piece of its message.
    macro_rules! spec_error {
        ($name:ident, yaml: $yaml:expr, line: $line:expr, field: $field:expr, says: $says:expr) => {
            #[test]
            fn $name() {
                let (line, _col, field, message) = err(&$yaml);
                assert_eq!(line, $line, "line of: {message}");
                assert_eq!(field, $field, "field of: {message}");
                assert!(message.contains($says), "message: {message}");
            }
        };
    }

    #[test]
    fn good_spec_resolves_with_defaults() {
        let p = parse(Path::new("dir/spec.yaml"), GOOD.as_bytes().to_vec()).unwrap();
        assert_eq!(p.data_path, Path::new("dir/d.csv"));
        assert_eq!(p.feature_names(), ["a", "b"]);
        match p.split {
            SplitPlan::Protocol {
                seed,
                normal,
                anomaly,
            } => {
                assert_eq!(seed, Seed(7));
                assert_eq!(normal, [0.6, 0.2, 0.2]);
                assert_eq!(anomaly, [0.5, 0.5]);
            }
            _ => panic!("protocol split expected"),
        }
        assert_eq!(p.threshold, ThresholdPolicy::MaxF1);
        assert!(p.card.safety_caution.is_none());
    }

    spec_error!(unknown_key_is_refused,
        yaml: GOOD.replace("  owner: o\n", "  owner: o\n  colour: red\n"),
        line: 16, field: "card.colour", says: "unknown field `colour`");

    spec_error!(wrong_type_names_field,
        yaml: GOOD.replace("seed: 7", "seed: seven"),
        line: 11, field: "split.protocol.seed", says: "");

    spec_error!(fractions_must_sum_to_one,
        yaml: GOOD.replace("    seed: 7\n", "    seed: 7\n    normal: {train: 0.7, validation: 0.2, test: 0.2}\n"),
        line: 12, field: "split.protocol.normal", says: "sum to 1");

    spec_error!(fraction_out_of_range,
        yaml: GOOD.replace("    seed: 7\n", "    seed: 7\n    anomaly: {validation: 1.5, test: -0.5}\n"),
        line: 12, field: "split.protocol.anomaly.validation", says: "between 0 and 1");

    spec_error!(unknown_detector,
        yaml: GOOD.replace("multivariate-gaussian]", "isolation-thing]"),
        line: 12, field: "detectors[1]", says: "unknown variant");

    spec_error!(duplicate_feature,
        yaml: GOOD.replace("[a, b]", "[a, a]"),
        line: 8, field: "data.features[1]", says: "listed twice");

    spec_error!(label_values_equal,
        yaml: GOOD.replace("anomaly: bad", "anomaly: ok"),
        line: 7, field: "data.label.anomaly", says: "equals the normal value");

    spec_error!(wrong_format_version,
        yaml: GOOD.replace("format: 1", "format: 2"),
        line: 1, field: "format", says: "format `1`");

    spec_error!(missing_field,
        yaml: GOOD.replace("  intended-use: u\n", ""),
        line: 15, field: "card", says: "intended-use");

    spec_error!(yaml_syntax_error,
        yaml: GOOD.replace("  features: [a, b]", "  features: [a, b"),
        line: 9, field: "data.features", says: "");

    #[test]
    fn numeric_label_values_are_text() {
        let p = parse(
            Path::new("s.yaml"),
            GOOD.replace("normal: ok", "normal: 0")
                .replace("anomaly: bad", "anomaly: 1")
                .into_bytes(),
        )
        .unwrap();
        assert_eq!(
            (p.normal_value.as_str(), p.anomaly_value.as_str()),
            ("0", "1")
        );
    }

    #[test]
    fn alias_bomb_is_refused() {
        let mut yaml = String::from("a0: &a0 [x, x, x, x, x, x, x, x, x, x]\n");
        for i in 1..10 {
            let prev = i - 1;
            yaml.push_str(&format!(
                "a{i}: &a{i} [*a{prev}, *a{prev}, *a{prev}, *a{prev}, *a{prev}, *a{prev}, *a{prev}, *a{prev}, *a{prev}, *a{prev}]\n"
            ));
        }
        yaml.push_str(GOOD);
        let (_, _, _, message) = err(&yaml);
        assert!(!message.is_empty());
    }

    #[test]
    fn schema_names_the_top_level_keys() {
        let s = schema_json();
        for key in [
            "\"format\"",
            "\"data\"",
            "\"split\"",
            "\"detectors\"",
            "\"card\"",
        ] {
            assert!(s.contains(key), "{key} missing from schema");
        }
    }
}
