//! The spec: parsing the YAML into [`RawSpec`] and resolving it into a checked [`Plan`].
//!
//! This module reads the spec file and nothing else: no data file is opened
//! here. Every problem it finds is an [`Error::Spec`] with file, line, column
//! and field path. Code after this stage sees only [`Plan`].

mod raw;

pub use raw::{
    AnomalyFractions, CommandIo, DetectorKind, MissingPolicy, NormalFractions, OneOrMany, RawCard,
    RawCommand, RawData, RawDetector, RawFeature, RawFeatureMap, RawFeatureSet, RawFromColumn,
    RawGroups, RawLabel, RawProtocol, RawSpec, RawSplit, RawTime, Scalar, SelectionMetric,
    ThresholdPolicy, TransformKind,
};

use std::cell::RefCell;
use std::path::{Path, PathBuf};

use serde_saphyr::Spanned;

use crate::error::{Error, Location, Result};

/// The spec format version this release reads.
pub const FORMAT: u32 = 1;

// Upper bounds on the spec's knobs whose cost grows with their value (the
// README's Limits). Common practice, no source: each is far above what a
// sensible spec asks for (a bootstrap of 1,000 to 10,000 replicates, a k of
// a few to a few tens, from memory) and low enough that the work stays
// within hours on one machine.

/// Most bootstrap replicates (`bootstrap.replicates`).
pub const MAX_REPLICATES: u32 = 100_000;
/// Largest `k` of the `knn-distance` detector.
pub const MAX_KNN_K: usize = 1_000;
/// Largest `k-max` of the `gaussian-mixture` detector.
pub const MAX_MIXTURE_K: usize = 20;
/// Most feature sets (`data.feature-sets`).
pub const MAX_FEATURE_SETS: usize = 100;
/// Most features in one feature set.
pub const MAX_FEATURES: usize = 1_000;

/// A split seed.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, serde::Serialize, serde::Deserialize,
)]
pub struct Seed(pub u64);

/// How the bootstrap is drawn.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub struct BootstrapPlan {
    /// Replicates (0 turns the bootstrap off).
    pub replicates: u32,
    /// The seed.
    pub seed: u64,
}

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

/// One source path of the spec.
#[derive(Debug, Clone)]
pub struct SourcePlan {
    /// The path as written (a file, a glob or a directory).
    pub written: String,
    /// Resolved against the spec's directory.
    pub resolved: PathBuf,
    /// Where the spec names it.
    pub at: Location,
    /// The field path.
    pub field: String,
    /// `None` for a labelled source; `Some(is_anomaly)` when the label is implied.
    pub implied: Option<bool>,
}

/// The most seconds an external command may be given (`timeout-seconds`).
pub const MAX_COMMAND_SECONDS: u64 = 86_400;

/// An external program used as a detector (`detectors: [{command: ...}]`).
#[derive(Debug, Clone)]
pub struct CommandPlan {
    /// The candidate's name.
    pub name: String,
    /// The program and its arguments, as written.
    pub run: Vec<String>,
    /// The files it depends on: as written, and resolved against the spec's folder.
    pub inputs: Vec<(String, PathBuf)>,
    /// Seconds before it is killed.
    pub timeout_seconds: u64,
    /// The exchange files' format.
    pub io: CommandIo,
    /// Seed of the permutation of the rows to score.
    pub seed: u64,
    /// The spec's folder: the program's working directory.
    pub folder: PathBuf,
}

/// The label column of a labelled source.
#[derive(Debug, Clone)]
pub struct LabelPlan {
    /// The column.
    pub column: Column,
    /// The text value meaning normal.
    pub normal: String,
    /// The text value meaning anomaly.
    pub anomaly: String,
}

/// What a feature is computed from: indices into [`Plan::columns`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum FeatureInput {
    /// A column as it is.
    Column(usize),
    /// a / b.
    Ratio(usize, usize),
    /// a − b.
    Difference(usize, usize),
    /// a · b.
    Product(usize, usize),
}

/// One feature of a feature set.
#[derive(Debug, Clone)]
pub struct FeaturePlan {
    /// The feature's name.
    pub name: String,
    /// What it is computed from.
    pub input: FeatureInput,
    /// Transforms, in order.
    pub transforms: Vec<TransformKind>,
    /// Where the spec declares it.
    pub at: Location,
}

/// A named feature set.
#[derive(Debug, Clone)]
pub struct FeatureSetPlan {
    /// The set's name (`features` when the spec gives one unnamed set).
    pub name: String,
    /// Whether the spec named it (candidates are then called `set/detector`).
    pub named: bool,
    /// Its features.
    pub features: Vec<FeaturePlan>,
}

impl FeatureSetPlan {
    /// Feature names, in order.
    pub fn names(&self) -> Vec<String> {
        self.features.iter().map(|f| f.name.clone()).collect()
    }
}

/// Fractions of the normal (train, validation, test) and anomalous
/// (validation, test) rows.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Fractions {
    /// Normal rows: train, validation, test.
    pub normal: [f64; 3],
    /// Anomalous rows: validation, test.
    pub anomaly: [f64; 2],
}

/// How rows are assigned to splits, resolved.
#[derive(Debug, Clone)]
pub enum SplitPlan {
    /// Seeded stratified split with exact counts.
    Protocol {
        /// The seed.
        seed: Seed,
        /// The fractions.
        fractions: Fractions,
    },
    /// Seeded split of whole groups.
    Groups {
        /// The group column.
        column: Column,
        /// The seed.
        seed: Seed,
        /// The fractions.
        fractions: Fractions,
    },
    /// Ordered by a time column.
    Time {
        /// The time column.
        column: Column,
        /// The fractions.
        fractions: Fractions,
    },
    /// The split is read from a column.
    FromColumn {
        /// The split column.
        column: Column,
        /// A group column whose groups must each sit in one split.
        group: Option<Column>,
    },
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
    /// The sources: one labelled, or a normal and an anomalous one.
    pub sources: Vec<SourcePlan>,
    /// The label column (labelled source only).
    pub label: Option<LabelPlan>,
    /// The optional id column.
    pub id_column: Option<Column>,
    /// The missing-value policy.
    pub missing: MissingPolicy,
    /// Every numeric source column any feature uses, in order of first mention.
    /// Row content hashes cover exactly these columns and the label.
    pub columns: Vec<Column>,
    /// The feature sets, in spec order.
    pub feature_sets: Vec<FeatureSetPlan>,
    /// The split.
    pub split: SplitPlan,
    /// Candidate detectors, in spec order, without repeats.
    pub detectors: Vec<DetectorKind>,
    /// The external commands that `DetectorKind::Command` points into.
    pub commands: Vec<CommandPlan>,
    /// The threshold policy.
    pub threshold: ThresholdPolicy,
    /// The validation metric that ranks candidates.
    pub selection: SelectionMetric,
    /// The bootstrap behind the F1, AP and AUC intervals.
    pub bootstrap: BootstrapPlan,
    /// Card text.
    pub card: CardText,
    /// Default output directory, resolved against the spec's directory.
    pub output: Option<PathBuf>,
    /// The test ledger.
    pub ledger: PathBuf,
    /// Stream the data; train rows are summarised, never held (see `data.stream`).
    pub stream: bool,
}

impl Plan {
    /// The text columns the data stage must read: label, id, split, group or time.
    pub fn text_columns(&self) -> Vec<&Column> {
        let mut out: Vec<&Column> = Vec::new();
        out.extend(self.label.as_ref().map(|l| &l.column));
        out.extend(self.id_column.iter());
        match &self.split {
            SplitPlan::Protocol { .. } => {}
            SplitPlan::Groups { column, .. } | SplitPlan::Time { column, .. } => out.push(column),
            SplitPlan::FromColumn { column, group } => {
                out.push(column);
                out.extend(group.iter());
            }
        }
        out
    }

    /// The spec text (for caret rendering of errors found later).
    pub fn spec_text(&self) -> String {
        String::from_utf8_lossy(&self.spec_bytes).into_owned()
    }

    /// A spec error at a known place, found after parsing.
    pub fn error_at(&self, at: &Location, field: &str, message: String) -> Error {
        let text = self.spec_text();
        spec_error(
            &at.file,
            &text,
            at.line,
            at.column,
            field.to_string(),
            message,
        )
    }
}

/// Reads and resolves the spec at `path`.
pub fn load(path: &Path) -> Result<Plan> {
    crate::error::require_regular(path, "reading spec")?;
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
        let line_text = text.lines().nth(line.saturating_sub(1)).unwrap_or("");
        let message = with_found(bare_message(&e), line_text, column);
        spec_error(path, text, line, column, field, message)
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

/// For the parser's terse type errors ("invalid u64"), says what was expected
/// in words and what was found: the scalar at the error's column.
fn with_found(msg: String, line_text: &str, column: usize) -> String {
    // The range of each whole-number type, for a number too large for it.
    let (expected, range) = match msg.as_str() {
        "invalid u64" | "invalid usize" => ("a whole number ≥ 0", Some((0, u64::MAX as i128))),
        "invalid u32" => ("a whole number ≥ 0", Some((0, u32::MAX as i128))),
        "invalid i64" => ("a whole number", Some((i64::MIN as i128, i64::MAX as i128))),
        "invalid i32" => ("a whole number", Some((i32::MIN as i128, i32::MAX as i128))),
        "invalid floating point" | "invalid f64" => ("a number", None),
        "invalid boolean" | "invalid bool" => ("`true` or `false`", None),
        _ => return msg,
    };
    let rest: String = line_text.chars().skip(column.saturating_sub(1)).collect();
    let found: String = rest
        .chars()
        .take_while(|c| !matches!(c, ',' | '}' | ']' | '#'))
        .collect();
    let found = found.trim();
    let digits = found.strip_prefix('-').unwrap_or(found);
    if let Some((lo, hi)) = range {
        // A whole number the type cannot hold: say the range, not the type.
        let whole = !digits.is_empty() && digits.bytes().all(|b| b.is_ascii_digit());
        let negative = found.starts_with('-');
        let out_of_range = match found.parse::<i128>() {
            Ok(v) => v < lo || v > hi,
            Err(_) => whole,
        };
        if whole && out_of_range && !(negative && lo == 0) {
            return format!("`{found}` is out of range: expected a whole number from {lo} to {hi}");
        }
    }
    if found.is_empty() {
        format!("expected {expected}")
    } else {
        format!("expected {expected}, found `{found}`")
    }
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
    if msg.is_empty() {
        return "the spec could not be parsed".into();
    }
    match suggestion(&msg) {
        Some(s) => format!("{msg}; did you mean `{s}`?"),
        None => msg,
    }
}

/// For "unknown field `x`, expected one of a, b" (or "unknown variant"), the
/// expected name closest to `x`, if it is close enough to be a likely typo.
fn suggestion(msg: &str) -> Option<String> {
    let rest = msg
        .strip_prefix("unknown field ")
        .or_else(|| msg.strip_prefix("unknown variant "))?;
    let (got, expected) = rest.split_once(", expected ")?;
    let got = got.trim_matches('`');
    let expected = expected.strip_prefix("one of ").unwrap_or(expected);
    closest(
        got,
        expected.split(", ").map(|e| e.trim().trim_matches('`')),
    )
}

/// The candidate closest to `word` by Jaro-Winkler similarity, if at least
/// 0.8 (a common cut-off for typos; picked, not tuned).
pub fn closest<'a>(word: &str, candidates: impl Iterator<Item = &'a str>) -> Option<String> {
    candidates
        .map(|c| (strsim::jaro_winkler(word, c), c))
        .filter(|(score, _)| *score >= 0.8)
        .max_by(|a, b| a.0.total_cmp(&b.0).then(b.1.cmp(a.1)))
        .map(|(_, c)| c.to_string())
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

fn location_of<T>(path: &Path, s: &Spanned<T>) -> Location {
    let l = s.referenced;
    Location {
        file: path.to_path_buf(),
        line: (l.line() as usize).max(1),
        column: (l.column() as usize).max(1),
    }
}

impl Resolver<'_> {
    fn loc<T>(&self, s: &Spanned<T>) -> Location {
        location_of(self.path, s)
    }

    fn err<T>(&self, s: &Spanned<T>, field: &str, message: String) -> Error {
        let at = self.loc(s);
        spec_error(
            self.path,
            self.text,
            at.line,
            at.column,
            field.into(),
            message,
        )
    }

    fn column(&self, s: &Spanned<String>, field: String) -> Result<Column> {
        self.column_at(&s.value, self.loc(s), field)
    }

    fn column_at(&self, name: &str, at: Location, field: String) -> Result<Column> {
        if name.trim().is_empty() {
            return Err(spec_error(
                self.path,
                self.text,
                at.line,
                at.column,
                field,
                "a column name must not be empty".into(),
            ));
        }
        Ok(Column {
            name: name.to_string(),
            at,
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

    fn split_fractions(
        &self,
        field: &str,
        normal: &Option<Spanned<NormalFractions>>,
        anomaly: &Option<Spanned<AnomalyFractions>>,
    ) -> Result<Fractions> {
        let normal = match normal {
            Some(s) => {
                let v = s.value;
                self.fractions(
                    s,
                    &format!("{field}.normal"),
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
        let anomaly = match anomaly {
            Some(s) => {
                let v = s.value;
                self.fractions(
                    s,
                    &format!("{field}.anomaly"),
                    &[("validation", v.validation), ("test", v.test)],
                )?;
                [v.validation, v.test]
            }
            None => [0.5, 0.5],
        };
        Ok(Fractions { normal, anomaly })
    }

    fn source(
        &self,
        s: &Spanned<String>,
        field: &str,
        implied: Option<bool>,
    ) -> Result<SourcePlan> {
        if s.value.trim().is_empty() {
            return Err(self.err(s, field, "the data path is empty".into()));
        }
        let base = self.path.parent().unwrap_or(Path::new(""));
        Ok(SourcePlan {
            written: s.value.clone(),
            resolved: base.join(&s.value),
            at: self.loc(s),
            field: field.into(),
            implied,
        })
    }
}

/// Collects the numeric source columns in order of first mention.
struct Columns(Vec<Column>);

impl Columns {
    fn index(&mut self, c: Column) -> usize {
        match self.0.iter().position(|d| d.name == c.name) {
            Some(i) => i,
            None => {
                self.0.push(c);
                self.0.len() - 1
            }
        }
    }
}

/// A transform's name in specs and feature names.
pub fn transform_name(t: TransformKind) -> &'static str {
    match t {
        TransformKind::Log => "log",
        TransformKind::Log1p => "log1p",
        TransformKind::Sqrt => "sqrt",
        TransformKind::BoxCox => "box-cox",
        TransformKind::YeoJohnson => "yeo-johnson",
        TransformKind::Standardise => "standardise",
    }
}

fn feature(
    r: &Resolver<'_>,
    cols: &mut Columns,
    f: &Spanned<RawFeature>,
    field: String,
) -> Result<FeaturePlan> {
    let at = r.loc(f);
    let col = |cols: &mut Columns, name: &str, sub: &str| -> Result<usize> {
        Ok(cols.index(r.column_at(name, at.clone(), format!("{field}{sub}"))?))
    };
    let (base_name, input, transforms, explicit) = match &f.value {
        RawFeature::Column(name) => {
            let i = col(cols, name, "")?;
            (name.clone(), FeatureInput::Column(i), vec![], None)
        }
        RawFeature::Spelled(m) => {
            let given = [
                m.column.is_some(),
                m.ratio.is_some(),
                m.difference.is_some(),
                m.product.is_some(),
            ];
            if given.iter().filter(|g| **g).count() != 1 {
                return Err(r.err(
                    f,
                    &field,
                    "a feature needs exactly one of `column`, `ratio`, `difference`, `product`"
                        .into(),
                ));
            }
            let pair = |cols: &mut Columns,
                        p: &[String; 2],
                        key: &str|
             -> Result<(usize, usize, String, String)> {
                if p[0] == p[1] {
                    return Err(r.err(
                        f,
                        &format!("{field}.{key}"),
                        format!(
                            "a {key} needs two different columns, found `{}` twice",
                            p[0]
                        ),
                    ));
                }
                let a = col(cols, &p[0], &format!(".{key}[0]"))?;
                let b = col(cols, &p[1], &format!(".{key}[1]"))?;
                Ok((a, b, p[0].clone(), p[1].clone()))
            };
            let (name, input) = if let Some(c) = &m.column {
                (c.clone(), FeatureInput::Column(col(cols, c, ".column")?))
            } else if let Some(p) = &m.ratio {
                let (a, b, x, y) = pair(cols, p, "ratio")?;
                (format!("{x}/{y}"), FeatureInput::Ratio(a, b))
            } else if let Some(p) = &m.difference {
                let (a, b, x, y) = pair(cols, p, "difference")?;
                (format!("{x}-{y}"), FeatureInput::Difference(a, b))
            } else {
                let p = m.product.as_ref().expect("one of four is set");
                let (a, b, x, y) = pair(cols, p, "product")?;
                (format!("{x}*{y}"), FeatureInput::Product(a, b))
            };
            let transforms = m
                .transform
                .as_ref()
                .map(OneOrMany::to_vec)
                .unwrap_or_default();
            if m.transform.is_some() && transforms.is_empty() {
                return Err(r.err(
                    f,
                    &format!("{field}.transform"),
                    "the transform list is empty".into(),
                ));
            }
            (name, input, transforms, m.name.clone())
        }
    };
    let name = match explicit {
        Some(n) if n.trim().is_empty() => {
            return Err(r.err(
                f,
                &format!("{field}.name"),
                "a feature name must not be empty".into(),
            ))
        }
        Some(n) => n,
        None => transforms
            .iter()
            .fold(base_name, |acc, t| format!("{}({acc})", transform_name(*t))),
    };
    Ok(FeaturePlan {
        name,
        input,
        transforms,
        at,
    })
}

fn feature_list(
    r: &Resolver<'_>,
    cols: &mut Columns,
    list: &Spanned<Vec<Spanned<RawFeature>>>,
    field: &str,
    reserved: &[&Column],
) -> Result<Vec<FeaturePlan>> {
    if list.value.is_empty() {
        return Err(r.err(list, field, "at least one feature is needed".into()));
    }
    if list.value.len() > MAX_FEATURES {
        return Err(r.err(
            list,
            field,
            format!(
                "{} features; at most {MAX_FEATURES} are allowed in one set",
                list.value.len()
            ),
        ));
    }
    let mut out: Vec<FeaturePlan> = Vec::new();
    for (i, f) in list.value.iter().enumerate() {
        let sub = format!("{field}[{i}]");
        let p = feature(r, cols, f, sub.clone())?;
        if out.iter().any(|g| g.name == p.name) {
            return Err(r.err(f, &sub, format!("feature `{}` is listed twice", p.name)));
        }
        for c in reserved {
            let uses = |i: usize| cols.0[i].name == c.name;
            let hit = match p.input {
                FeatureInput::Column(a) => uses(a),
                FeatureInput::Ratio(a, b)
                | FeatureInput::Difference(a, b)
                | FeatureInput::Product(a, b) => uses(a) || uses(b),
            };
            if hit {
                return Err(r.err(
                    f,
                    &sub,
                    format!(
                        "`{}` is already used as {} and cannot be a feature",
                        c.name, c.field
                    ),
                ));
            }
        }
        out.push(p);
    }
    Ok(out)
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

    // Sources and labels.
    let (sources, label) =
        match (&data.path, &data.normal_path, &data.anomaly_path) {
            (Some(p), None, None) => {
                let l = data.label.as_ref().ok_or_else(|| {
                    r.err(
                        p,
                        "data.label",
                        "a labelled source needs `label` (column, normal, anomaly)".into(),
                    )
                })?;
                let column = r.column(&l.column, "data.label.column".into())?;
                let normal = l.normal.value.as_text();
                let anomaly = l.anomaly.value.as_text();
                if normal == anomaly {
                    return Err(r.err(
                        &l.anomaly,
                        "data.label.anomaly",
                        format!("the anomaly value `{anomaly}` equals the normal value"),
                    ));
                }
                (
                    vec![r.source(p, "data.path", None)?],
                    Some(LabelPlan {
                        column,
                        normal,
                        anomaly,
                    }),
                )
            }
            (None, Some(n), Some(a)) => {
                if let Some(l) = &data.label {
                    return Err(r.err(
                    &l.column,
                    "data.label",
                    "with `normal-path` and `anomaly-path` the label is implied by the source; \
                     remove `label`"
                        .into(),
                ));
                }
                (
                    vec![
                        r.source(n, "data.normal-path", Some(false))?,
                        r.source(a, "data.anomaly-path", Some(true))?,
                    ],
                    None,
                )
            }
            (Some(p), _, _) => return Err(r.err(
                p,
                "data.path",
                "give either `path` (one labelled source) or `normal-path` and `anomaly-path`, \
                 not both"
                    .into(),
            )),
            (None, Some(s), None) | (None, None, Some(s)) => {
                return Err(r.err(
                    s,
                    "data",
                    "`normal-path` and `anomaly-path` go together".into(),
                ))
            }
            (None, None, None) => return Err(r.err(
                &raw.format,
                "data",
                "no data source: give `data.path`, or `data.normal-path` and `data.anomaly-path`"
                    .into(),
            )),
        };
    let id_column = match &data.id_column {
        Some(s) => Some(r.column(s, "data.id-column".into())?),
        None => None,
    };

    let split = match &raw.split {
        RawSplit::Protocol(p) => SplitPlan::Protocol {
            seed: Seed(p.seed),
            fractions: r.split_fractions("split.protocol", &p.normal, &p.anomaly)?,
        },
        RawSplit::Groups(g) => SplitPlan::Groups {
            column: r.column(&g.column, "split.groups.column".into())?,
            seed: Seed(g.seed),
            fractions: r.split_fractions("split.groups", &g.normal, &g.anomaly)?,
        },
        RawSplit::Time(t) => SplitPlan::Time {
            column: r.column(&t.column, "split.time.column".into())?,
            fractions: r.split_fractions("split.time", &t.normal, &t.anomaly)?,
        },
        RawSplit::FromColumn(s) => {
            let at = r.loc(s);
            let column = r.column_at(&s.value.0.column, at.clone(), "split.from-column".into())?;
            let group = match &s.value.0.group_column {
                Some(g) => Some(r.column_at(g, at, "split.from-column.group-column".into())?),
                None => None,
            };
            SplitPlan::FromColumn { column, group }
        }
    };

    // Text columns may not double as one another or as features.
    let mut text_cols: Vec<&Column> = Vec::new();
    text_cols.extend(label.as_ref().map(|l| &l.column));
    text_cols.extend(id_column.iter());
    match &split {
        SplitPlan::Protocol { .. } => {}
        SplitPlan::Groups { column, .. } | SplitPlan::Time { column, .. } => text_cols.push(column),
        SplitPlan::FromColumn { column, group } => {
            text_cols.push(column);
            text_cols.extend(group.iter());
        }
    }
    for (i, a) in text_cols.iter().enumerate() {
        if let Some(b) = text_cols[..i].iter().find(|b| b.name == a.name) {
            return Err(r.err_at(a, format!("`{}` is already used as {}", a.name, b.field)));
        }
    }

    // Features.
    let mut cols = Columns(Vec::new());
    let feature_sets = match (&data.features, &data.feature_sets) {
        (Some(list), None) => vec![FeatureSetPlan {
            name: "features".into(),
            named: false,
            features: feature_list(&r, &mut cols, list, "data.features", &text_cols)?,
        }],
        (None, Some(sets)) => {
            if sets.value.is_empty() {
                return Err(r.err(
                    sets,
                    "data.feature-sets",
                    "at least one feature set is needed".into(),
                ));
            }
            if sets.value.len() > MAX_FEATURE_SETS {
                return Err(r.err(
                    sets,
                    "data.feature-sets",
                    format!(
                        "{} feature sets; at most {MAX_FEATURE_SETS} are allowed",
                        sets.value.len()
                    ),
                ));
            }
            let mut out: Vec<FeatureSetPlan> = Vec::new();
            for (i, set) in sets.value.iter().enumerate() {
                let field = format!("data.feature-sets[{i}]");
                let name = set.name.value.trim();
                if name.is_empty() || name.contains(['/', ',', '"']) {
                    return Err(r.err(
                        &set.name,
                        &format!("{field}.name"),
                        "a feature-set name must be non-empty, without `/`, `,` or `\"`".into(),
                    ));
                }
                if out.iter().any(|o| o.name == name) {
                    return Err(r.err(
                        &set.name,
                        &format!("{field}.name"),
                        format!("feature set `{name}` is named twice"),
                    ));
                }
                out.push(FeatureSetPlan {
                    name: name.to_string(),
                    named: true,
                    features: feature_list(
                        &r,
                        &mut cols,
                        &set.features,
                        &format!("{field}.features"),
                        &text_cols,
                    )?,
                });
            }
            out
        }
        (Some(list), Some(_)) => {
            return Err(r.err(
                list,
                "data.features",
                "give either `features` or `feature-sets`, not both".into(),
            ))
        }
        (None, None) => {
            return Err(r.err(
                &raw.format,
                "data",
                "no features: give `data.features` or `data.feature-sets`".into(),
            ))
        }
    };

    if raw.detectors.value.is_empty() {
        return Err(r.err(
            &raw.detectors,
            "detectors",
            "at least one candidate detector is needed".into(),
        ));
    }
    let mut detectors: Vec<DetectorKind> = Vec::new();
    let mut commands: Vec<CommandPlan> = Vec::new();
    for (i, d) in raw.detectors.value.iter().enumerate() {
        let field = format!("detectors[{i}]");
        let kind = match &d.value {
            RawDetector::Builtin(kind) => *kind,
            RawDetector::Command(c) => {
                let c = resolve_command(&r, d, &field, c, base, &detectors, &commands)?;
                commands.push(c);
                detectors.push(DetectorKind::Command(commands.len() - 1));
                continue;
            }
        };
        let name = kind.name();
        if detectors.iter().any(|e| e.name() == name) {
            return Err(r.err(d, &field, format!("detector `{name}` is listed twice")));
        }
        let bad = |what: String| Err(r.err(d, &format!("{field}.{name}"), what));
        match kind {
            DetectorKind::RobustGaussian {
                support_fraction: Some(f),
                ..
            } if !(f > 0.5 && f <= 1.0) => {
                return bad(format!(
                    "`support-fraction` must be above 0.5 and at most 1, found `{f}`"
                ));
            }
            DetectorKind::GaussianMixture {
                k_min,
                k_max,
                covariance_floor,
                ..
            } => {
                if k_min < 1 || k_max < k_min || k_max > MAX_MIXTURE_K {
                    return bad(format!(
                        "need 1 ≤ `k-min` ≤ `k-max` ≤ {MAX_MIXTURE_K}, found {k_min} and {k_max}"
                    ));
                }
                if !(covariance_floor >= 0.0 && covariance_floor.is_finite()) {
                    return bad(format!(
                        "`covariance-floor` must be ≥ 0, found `{covariance_floor}`"
                    ));
                }
            }
            DetectorKind::KnnDistance { k } if k < 1 => {
                return bad("`k` must be at least 1".into());
            }
            DetectorKind::KnnDistance { k } if k > MAX_KNN_K => {
                return bad(format!("`k` must be at most {MAX_KNN_K}, found {k}"));
            }
            _ => {}
        }
        detectors.push(kind);
    }

    let stream = match data.stream.as_ref().filter(|s| s.value) {
        None => false,
        Some(s) => {
            let bad = |m: String| Err(r.err(s, "data.stream", m));
            if label.is_none() || sources.len() != 1 {
                return bad("streaming reads one labelled source: `path` with `label`".into());
            }
            if !matches!(split, SplitPlan::FromColumn { group: None, .. }) {
                return bad(
                    "streaming needs `split: from-column` without a group column: the other \
                     methods place rows by looking at all of them at once"
                        .into(),
                );
            }
            if let Some(d) = detectors.iter().find(|d| {
                !matches!(
                    d,
                    DetectorKind::IndependentGaussian | DetectorKind::MultivariateGaussian
                )
            }) {
                return bad(format!(
                    "`{}` needs its training rows in memory; streaming fits the \
                     independent-gaussian and multivariate-gaussian from sufficient statistics",
                    d.name()
                ));
            }
            for f in feature_sets.iter().flat_map(|s| &s.features) {
                if let Some(t) = f.transforms.iter().find(|t| {
                    matches!(
                        t,
                        TransformKind::BoxCox
                            | TransformKind::YeoJohnson
                            | TransformKind::Standardise
                    )
                }) {
                    return bad(format!(
                        "feature `{}`: `{}` fits a parameter on the training rows, which \
                         streaming does not keep; use log, log1p or sqrt",
                        f.name,
                        transform_name(*t)
                    ));
                }
            }
            true
        }
    };

    let threshold = match &raw.threshold {
        None => ThresholdPolicy::MaxF1,
        Some(t) => {
            check_policy(&r, t)?;
            t.value
        }
    };

    let selection = raw.selection.map_or(SelectionMetric::F1, |s| s.metric);
    if selection == SelectionMetric::FBeta && !matches!(threshold, ThresholdPolicy::MaxFBeta { .. })
    {
        return Err(r.err(
            &raw.format,
            "selection.metric",
            "`f-beta` ranks by the β of the `max-f-beta` threshold policy; declare that policy"
                .into(),
        ));
    }

    if let Some(n) = raw.bootstrap.as_ref().map(|b| &b.replicates) {
        if n.value > MAX_REPLICATES {
            return Err(r.err(
                n,
                "bootstrap.replicates",
                format!(
                    "`replicates` must be at most {MAX_REPLICATES}, found {}",
                    n.value
                ),
            ));
        }
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
        sources,
        label,
        id_column,
        missing: data.missing_values,
        columns: cols.0,
        feature_sets,
        split,
        detectors,
        commands,
        threshold,
        selection,
        bootstrap: BootstrapPlan {
            replicates: raw.bootstrap.as_ref().map_or(1000, |b| b.replicates.value),
            seed: raw.bootstrap.as_ref().map_or(1, |b| b.seed),
        },
        card: CardText {
            title: card.title.value.clone(),
            owner: card.owner.clone(),
            intended_use: card.intended_use.clone(),
            out_of_scope_uses: card.out_of_scope_uses.clone(),
            safety_caution,
        },
        output: raw.output.as_ref().map(|o| base.join(&o.value)),
        ledger: base.join(raw.ledger.clone().unwrap_or_else(|| {
            let stem = path
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_else(|| "spec".into());
            format!("{stem}.test-ledger.jsonl")
        })),
        stream,
    })
}

/// Checks a `command:` detector and resolves its paths.
fn resolve_command(
    r: &Resolver<'_>,
    d: &Spanned<RawDetector>,
    field: &str,
    c: &RawCommand,
    base: &Path,
    detectors: &[DetectorKind],
    commands: &[CommandPlan],
) -> Result<CommandPlan> {
    let bad = |what: String| Err(r.err(d, &format!("{field}.command"), what));
    let name = c.name.trim();
    if name.is_empty() || name != c.name || name.contains(['/', ',', '"', '\n', '\r']) {
        return bad(format!(
            "`name` must be non-empty, without surrounding spaces, `/`, `,`, quotes or line ends, found `{}`",
            c.name
        ));
    }
    if detectors
        .iter()
        .any(|k| !matches!(k, DetectorKind::Command(_)) && k.name() == name)
        || name == "command"
        || commands.iter().any(|e| e.name == name)
    {
        return bad(format!(
            "the name `{name}` is already used by another detector; give each command its own name"
        ));
    }
    if c.run.is_empty() || c.run[0].is_empty() {
        return bad("`run` must name a program: `run: [PROGRAM, ARG...]`".into());
    }
    if c.run.iter().any(|a| a.contains('\0')) {
        return bad("an argument of `run` holds a NUL character".into());
    }
    if c.timeout_seconds < 1 || c.timeout_seconds > MAX_COMMAND_SECONDS {
        return bad(format!(
            "`timeout-seconds` must be between 1 and {MAX_COMMAND_SECONDS}, found {}",
            c.timeout_seconds
        ));
    }
    let mut inputs: Vec<(String, PathBuf)> = Vec::new();
    for f in &c.inputs {
        if f.is_empty() || inputs.iter().any(|(w, _)| w == f) {
            return bad(format!("`inputs` lists `{f}` twice or empty"));
        }
        inputs.push((f.clone(), base.join(f)));
    }
    let folder = if base.as_os_str().is_empty() {
        PathBuf::from(".")
    } else {
        base.to_path_buf()
    };
    Ok(CommandPlan {
        name: name.to_string(),
        run: c.run.clone(),
        inputs,
        timeout_seconds: c.timeout_seconds,
        io: c.io,
        seed: c.seed,
        folder,
    })
}

fn check_policy(r: &Resolver<'_>, t: &Spanned<ThresholdPolicy>) -> Result<()> {
    let unit = |v: f64, name: &str| -> Result<()> {
        if v.is_finite() && (0.0..=1.0).contains(&v) {
            Ok(())
        } else {
            Err(r.err(
                t,
                &format!("threshold.{name}"),
                format!("`{name}` must lie between 0 and 1, found `{v}`"),
            ))
        }
    };
    match t.value {
        ThresholdPolicy::MaxF1 => Ok(()),
        ThresholdPolicy::MaxFBeta { beta } => {
            if beta.is_finite() && beta > 0.0 {
                Ok(())
            } else {
                Err(r.err(
                    t,
                    "threshold.max-f-beta.beta",
                    format!("β must be a positive number, found `{beta}`"),
                ))
            }
        }
        ThresholdPolicy::AlarmBudget {
            max_false_positive_rate,
        } => unit(max_false_positive_rate, "max-false-positive-rate"),
        ThresholdPolicy::Conformal {
            max_false_positive_rate: a,
        } => {
            if a.is_finite() && a > 0.0 && a < 1.0 {
                Ok(())
            } else {
                Err(r.err(
                    t,
                    "threshold.conformal.max-false-positive-rate",
                    format!(
                        "`max-false-positive-rate` must lie strictly between 0 and 1, found `{a}`"
                    ),
                ))
            }
        }
        ThresholdPolicy::RecallTarget { min_recall } => unit(min_recall, "min-recall"),
        ThresholdPolicy::PrecisionTarget { min_precision } => unit(min_precision, "min-precision"),
        ThresholdPolicy::MinCost {
            missed_anomaly,
            false_alarm,
        } => {
            let ok = |c: f64| c.is_finite() && c >= 0.0;
            if ok(missed_anomaly) && ok(false_alarm) && missed_anomaly + false_alarm > 0.0 {
                Ok(())
            } else {
                Err(r.err(
                    t,
                    "threshold.min-cost",
                    "both costs must be ≥ 0 and not both 0".into(),
                ))
            }
        }
        ThresholdPolicy::Fixed { tau, ln_epsilon } => match (tau, ln_epsilon) {
            (Some(v), None) | (None, Some(v)) if v.is_finite() => Ok(()),
            _ => Err(r.err(
                t,
                "threshold.fixed",
                "give exactly one finite `tau` or `ln-epsilon`".into(),
            )),
        },
    }
}

impl Resolver<'_> {
    fn err_at(&self, c: &Column, message: String) -> Error {
        spec_error(
            self.path,
            self.text,
            c.at.line,
            c.at.column,
            c.field.clone(),
            message,
        )
    }
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
        assert_eq!(p.sources[0].resolved, Path::new("dir/d.csv"));
        assert_eq!(p.feature_sets.len(), 1);
        assert_eq!(p.feature_sets[0].names(), ["a", "b"]);
        assert!(!p.feature_sets[0].named);
        match p.split {
            SplitPlan::Protocol { seed, fractions } => {
                assert_eq!(seed, Seed(7));
                assert_eq!(fractions.normal, [0.6, 0.2, 0.2]);
                assert_eq!(fractions.anomaly, [0.5, 0.5]);
            }
            _ => panic!("protocol split expected"),
        }
        assert_eq!(p.threshold, ThresholdPolicy::MaxF1);
        assert_eq!(p.missing, MissingPolicy::Refuse);
        assert!(p.card.safety_caution.is_none());
    }

    #[test]
    fn derived_features_and_sets_share_one_column_list() {
        let yaml = GOOD.replace(
            "  features: [a, b]\n",
            "  feature-sets:\n    - name: plain\n      features: [a, b]\n    - name: ratio\n      features:\n        - a\n        - {ratio: [b, c], transform: [log, standardise]}\n        - {column: c, transform: box-cox, name: c-bc}\n",
        );
        let p = parse(Path::new("s.yaml"), yaml.into_bytes()).unwrap();
        let cols: Vec<&str> = p.columns.iter().map(|c| c.name.as_str()).collect();
        assert_eq!(cols, ["a", "b", "c"]);
        assert_eq!(
            p.feature_sets[1].names(),
            ["a", "standardise(log(b/c))", "c-bc"]
        );
        assert_eq!(
            p.feature_sets[1].features[1].input,
            FeatureInput::Ratio(1, 2)
        );
        assert!(p.feature_sets[1].named);
    }

    #[test]
    fn separate_sources_imply_the_label() {
        let yaml = GOOD.replace(
            "  path: d.csv\n  label:\n    column: y\n    normal: ok\n    anomaly: bad\n",
            "  normal-path: normal/*.parquet\n  anomaly-path: bad.csv\n",
        );
        let p = parse(Path::new("s.yaml"), yaml.into_bytes()).unwrap();
        assert!(p.label.is_none());
        assert_eq!(p.sources[0].implied, Some(false));
        assert_eq!(p.sources[1].implied, Some(true));
    }

    spec_error!(label_with_separate_sources_is_refused,
        yaml: GOOD.replace("  path: d.csv\n", "  normal-path: n.csv\n  anomaly-path: a.csv\n"),
        line: 6, field: "data.label", says: "implied by the source");

    spec_error!(unknown_key_gets_a_suggestion,
        yaml: GOOD.replace("  owner: o\n", "  owner: o\n  intended-uses: x\n"),
        line: 16, field: "card.intended-uses", says: "did you mean `intended-use`?");

    spec_error!(derived_feature_needs_one_input,
        yaml: GOOD.replace("[a, b]", "[a, {ratio: [a, b], column: c}]"),
        line: 8, field: "data.features[1]", says: "exactly one of");

    spec_error!(ratio_of_a_column_with_itself,
        yaml: GOOD.replace("[a, b]", "[a, {ratio: [b, b]}]"),
        line: 8, field: "data.features[1].ratio", says: "two different columns");

    spec_error!(group_split_column_cannot_be_a_feature,
        yaml: GOOD.replace("  protocol:\n    seed: 7\n", "  groups:\n    column: a\n    seed: 7\n"),
        line: 8, field: "data.features[0]", says: "`a` is already used as split.groups.column");

    spec_error!(unknown_key_is_refused,
        yaml: GOOD.replace("  owner: o\n", "  owner: o\n  colour: red\n"),
        line: 16, field: "card.colour", says: "unknown field `colour`");

    spec_error!(wrong_type_names_field,
        yaml: GOOD.replace("seed: 7", "seed: seven"),
        line: 11, field: "split.protocol.seed", says: "expected a whole number ≥ 0, found `seven`");

    spec_error!(wrong_type_in_a_flow_map,
        yaml: GOOD.replace("    seed: 7\n", "    seed: 7\n    normal: {train: x, validation: 0.2, test: 0.2}\n"),
        line: 12, field: "split.protocol.normal.train", says: "expected a number, found `x`");

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
        let l = p.label.unwrap();
        assert_eq!((l.normal.as_str(), l.anomaly.as_str()), ("0", "1"));
    }

    #[test]
    fn closest_name_needs_real_similarity() {
        let names = ["train", "validation", "test"];
        assert_eq!(
            closest("validaton", names.iter().copied()).as_deref(),
            Some("validation")
        );
        assert_eq!(closest("zebra", names.iter().copied()), None);
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
