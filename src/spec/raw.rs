//! `RawSpec`: the YAML spec exactly as written, for serde and schemars.
//!
//! Nothing here checks meaning (fractions that sum to one, distinct columns):
//! that is [`super::resolve`]'s job. Fields whose later checks need a position
//! are [`Spanned`], so an error can point at the value itself. Values that may
//! be written in two forms (a feature as a column name or as a map) have a
//! hand-written `Deserialize` that reads both without buffering, so that their
//! positions survive.

use std::fmt;

use schemars::JsonSchema;
use serde::de::{self, MapAccess, Visitor};
use serde::{Deserialize, Deserializer};
use serde_saphyr::Spanned;

/// The spec file as written. Format version 1.
#[derive(Debug, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
#[schemars(
    title = "anomark spec",
    description = "An anomaly-detector validation protocol"
)]
pub struct RawSpec {
    /// The spec format version. This release reads version 1.
    #[schemars(with = "u32")]
    pub format: Spanned<u32>,
    /// Where the labelled examples come from and which columns matter.
    pub data: RawData,
    /// How rows are assigned to train, validation and test.
    pub split: RawSplit,
    /// The candidate detectors, compared on validation.
    #[schemars(with = "Vec<DetectorSchema>")]
    pub detectors: Spanned<Vec<Spanned<RawDetector>>>,
    /// How each candidate's threshold is chosen on validation (default `max-f1`).
    #[serde(default)]
    #[schemars(with = "Option<ThresholdPolicy>")]
    pub threshold: Option<Spanned<ThresholdPolicy>>,
    /// The validation metric that ranks the candidates (default F1).
    #[serde(default)]
    pub selection: Option<RawSelection>,
    /// The seeded bootstrap behind the F1, AP and AUC intervals.
    #[serde(default)]
    pub bootstrap: Option<RawBootstrap>,
    /// Text for the model card.
    pub card: RawCard,
    /// The test ledger, relative to the spec (default `<spec name>.test-ledger.jsonl`
    /// beside it); commit it with the spec.
    #[serde(default)]
    pub ledger: Option<String>,
    /// Default output directory, relative to the spec file (`--out` overrides it).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub output: Option<Spanned<String>>,
}

/// The sources and the columns that matter.
#[derive(Debug, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawData {
    /// One labelled source: a CSV or Parquet file, a glob such as
    /// `parts/*.parquet`, or a directory of Parquet files; relative to the spec.
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub path: Option<Spanned<String>>,
    /// With separate sources: the normal examples (the label is implied).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub normal_path: Option<Spanned<String>>,
    /// With separate sources: the known anomalies (the label is implied).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub anomaly_path: Option<Spanned<String>>,
    /// The label column and its two values (one labelled source only).
    #[serde(default)]
    pub label: Option<RawLabel>,
    /// An optional column that identifies each row (echoed in scores.csv).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub id_column: Option<Spanned<String>>,
    /// What to do with a row whose feature value is missing.
    #[serde(default)]
    pub missing_values: MissingPolicy,
    /// The features, in the order the detectors see them (one feature set).
    #[serde(default)]
    #[schemars(with = "Option<Vec<FeatureSchema>>")]
    pub features: Option<Spanned<Vec<Spanned<RawFeature>>>>,
    /// Several named feature sets, each compared with every detector.
    #[serde(default)]
    #[schemars(with = "Option<Vec<RawFeatureSet>>")]
    pub feature_sets: Option<Spanned<Vec<RawFeatureSet>>>,
    /// Stream the data instead of loading it: the training rows are never held
    /// in memory, and the Gaussian detectors fit from sufficient statistics
    /// merged block by block. Needs one labelled source, `split: from-column`,
    /// the independent or multivariate Gaussian, and transforms without fitted
    /// parameters (log, log1p, sqrt).
    #[serde(default)]
    #[schemars(with = "Option<bool>")]
    pub stream: Option<Spanned<bool>>,
}

/// What to do with a row whose feature value is missing.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, JsonSchema, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum MissingPolicy {
    /// Stop the run, naming the rows (the default).
    #[default]
    Refuse,
    /// Leave the row out; the counts left out are recorded.
    DropRow,
}

/// A named feature set.
#[derive(Debug, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawFeatureSet {
    /// The set's name, used in candidate names (`set/detector`).
    #[schemars(with = "String")]
    pub name: Spanned<String>,
    /// Its features.
    #[schemars(with = "Vec<FeatureSchema>")]
    pub features: Spanned<Vec<Spanned<RawFeature>>>,
}

/// A feature: a column name, or a map with a column or a derivation and
/// optional transforms.
#[derive(Debug, Clone)]
pub enum RawFeature {
    /// A numeric column, used as it is.
    Column(String),
    /// A column or derived value with optional transforms.
    Spelled(RawFeatureMap),
}

/// The schema of [`RawFeature`] (the type itself has a hand-written reader).
#[derive(JsonSchema)]
#[serde(untagged)]
#[allow(dead_code)]
pub enum FeatureSchema {
    /// A numeric column, used as it is.
    Column(String),
    /// A column or derived value with optional transforms.
    Spelled(RawFeatureMap),
}

/// A feature written as a map.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawFeatureMap {
    /// The feature's name (default: the column, or `a/b`, `a-b`, `a*b`).
    #[serde(default)]
    pub name: Option<String>,
    /// A numeric column.
    #[serde(default)]
    pub column: Option<String>,
    /// The ratio of two columns, `[numerator, denominator]`.
    #[serde(default)]
    pub ratio: Option<[String; 2]>,
    /// The difference of two columns, `[a, b]` for a − b.
    #[serde(default)]
    pub difference: Option<[String; 2]>,
    /// The product of two columns.
    #[serde(default)]
    pub product: Option<[String; 2]>,
    /// Transforms applied in order, each fitted on the training rows only.
    #[serde(default)]
    pub transform: Option<OneOrMany<TransformKind>>,
}

/// One value or a list of values.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(untagged)]
pub enum OneOrMany<T> {
    /// A single value.
    One(T),
    /// A list.
    Many(Vec<T>),
}

impl<T: Clone> OneOrMany<T> {
    /// The values as a list.
    pub fn to_vec(&self) -> Vec<T> {
        match self {
            OneOrMany::One(t) => vec![t.clone()],
            OneOrMany::Many(v) => v.clone(),
        }
    }
}

/// A feature transform.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, JsonSchema, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum TransformKind {
    /// ln x (x > 0).
    Log,
    /// ln(1 + x) (x > −1).
    Log1p,
    /// √x (x ≥ 0).
    Sqrt,
    /// Box-Cox with λ by maximum likelihood on train (x > 0).
    BoxCox,
    /// Yeo-Johnson with λ by maximum likelihood on train (any x).
    YeoJohnson,
    /// (x − mean) / standard deviation of train.
    Standardise,
}

impl<'de> Deserialize<'de> for RawFeature {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = RawFeature;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str(
                    "a column name or a map with `column`, `ratio`, `difference` or `product`",
                )
            }
            fn visit_str<E: de::Error>(self, s: &str) -> Result<RawFeature, E> {
                Ok(RawFeature::Column(s.to_string()))
            }
            fn visit_map<A: MapAccess<'de>>(self, map: A) -> Result<RawFeature, A::Error> {
                RawFeatureMap::deserialize(de::value::MapAccessDeserializer::new(map))
                    .map(RawFeature::Spelled)
            }
        }
        d.deserialize_any(V)
    }
}

/// The label column and which of its values mean normal and anomaly.
#[derive(Debug, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawLabel {
    /// Column name.
    #[schemars(with = "String")]
    pub column: Spanned<String>,
    /// The value that marks a normal example.
    #[schemars(with = "Scalar")]
    pub normal: Spanned<Scalar>,
    /// The value that marks a known anomaly.
    #[schemars(with = "Scalar")]
    pub anomaly: Spanned<Scalar>,
}

/// A label value: text, a whole number or a boolean, compared as text.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(untagged)]
pub enum Scalar {
    /// Text.
    Text(String),
    /// A whole number.
    Integer(i64),
    /// A boolean.
    Boolean(bool),
}

impl Scalar {
    /// The value as it would appear in a CSV cell.
    pub fn as_text(&self) -> String {
        match self {
            Scalar::Text(s) => s.clone(),
            Scalar::Integer(i) => i.to_string(),
            Scalar::Boolean(b) => b.to_string(),
        }
    }
}

/// The split method.
#[derive(Debug, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub enum RawSplit {
    /// Seeded, stratified, content-hashed split of the labelled rows.
    Protocol(RawProtocol),
    /// Like `protocol`, but every row of a group (a die, a batch) lands in one split.
    Groups(RawGroups),
    /// Train before validation before test along a time column.
    Time(RawTime),
    /// A column whose values are `train`, `validation` or `test`.
    #[schemars(with = "FromColumnSchema")]
    FromColumn(Spanned<RawFromColumn>),
}

/// The seed and fractions of the protocol split.
#[derive(Debug, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawProtocol {
    /// The seed that alone determines the split.
    pub seed: u64,
    /// Fractions of the normal rows (default 0.6 / 0.2 / 0.2).
    #[serde(default)]
    #[schemars(with = "Option<NormalFractions>")]
    pub normal: Option<Spanned<NormalFractions>>,
    /// Fractions of the anomalous rows; none go to train (default 0.5 / 0.5).
    #[serde(default)]
    #[schemars(with = "Option<AnomalyFractions>")]
    pub anomaly: Option<Spanned<AnomalyFractions>>,
}

/// The group-aware split.
#[derive(Debug, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawGroups {
    /// The column naming each row's group.
    #[schemars(with = "String")]
    pub column: Spanned<String>,
    /// The seed that alone determines the split.
    pub seed: u64,
    /// Fractions of the normal rows (default 0.6 / 0.2 / 0.2).
    #[serde(default)]
    #[schemars(with = "Option<NormalFractions>")]
    pub normal: Option<Spanned<NormalFractions>>,
    /// Fractions of the anomalous rows (default 0.5 / 0.5).
    #[serde(default)]
    #[schemars(with = "Option<AnomalyFractions>")]
    pub anomaly: Option<Spanned<AnomalyFractions>>,
}

/// The time-ordered split.
#[derive(Debug, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawTime {
    /// The time column: numbers, or text that sorts in time order (ISO 8601).
    #[schemars(with = "String")]
    pub column: Spanned<String>,
    /// Fractions of the normal rows, earliest first (default 0.6 / 0.2 / 0.2).
    #[serde(default)]
    #[schemars(with = "Option<NormalFractions>")]
    pub normal: Option<Spanned<NormalFractions>>,
    /// Fractions of the anomalous rows, earliest to validation (default 0.5 / 0.5).
    #[serde(default)]
    #[schemars(with = "Option<AnomalyFractions>")]
    pub anomaly: Option<Spanned<AnomalyFractions>>,
}

/// A fixed split: the column, and optionally a group column whose groups must
/// each sit in one split.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawFromColumnMap {
    /// The split column.
    pub column: String,
    /// A group column: a group found in two splits is refused.
    #[serde(default)]
    pub group_column: Option<String>,
}

/// The fixed split as written: a column name or a map.
#[derive(Debug, Clone)]
pub struct RawFromColumn(pub RawFromColumnMap);

/// The schema of [`RawFromColumn`].
#[derive(JsonSchema)]
#[serde(untagged)]
#[allow(dead_code)]
pub enum FromColumnSchema {
    /// The split column.
    Column(String),
    /// The split column and a group column.
    WithGroups(RawFromColumnMap),
}

impl<'de> Deserialize<'de> for RawFromColumn {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = RawFromColumn;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a column name or a map with `column` and `group-column`")
            }
            fn visit_str<E: de::Error>(self, s: &str) -> Result<RawFromColumn, E> {
                Ok(RawFromColumn(RawFromColumnMap {
                    column: s.to_string(),
                    group_column: None,
                }))
            }
            fn visit_map<A: MapAccess<'de>>(self, map: A) -> Result<RawFromColumn, A::Error> {
                RawFromColumnMap::deserialize(de::value::MapAccessDeserializer::new(map))
                    .map(RawFromColumn)
            }
        }
        d.deserialize_any(V)
    }
}

/// Fractions of the normal rows; they must sum to 1.
#[derive(Debug, Clone, Copy, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct NormalFractions {
    /// Share used to fit the detectors.
    pub train: f64,
    /// Share used to choose thresholds and detectors.
    pub validation: f64,
    /// Share held out for the final numbers.
    pub test: f64,
}

/// Fractions of the anomalous rows; they must sum to 1.
#[derive(Debug, Clone, Copy, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct AnomalyFractions {
    /// Share used to choose thresholds and detectors.
    pub validation: f64,
    /// Share held out for the final numbers.
    pub test: f64,
}

/// A candidate detector: a name (with default settings) or a one-key map of
/// the name to its settings.
#[derive(Debug, Clone, Copy, PartialEq, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub enum DetectorKind {
    /// One Gaussian per feature, features treated as independent.
    IndependentGaussian,
    /// One Gaussian over all features with a full covariance.
    MultivariateGaussian,
    /// A Gaussian fitted by the Minimum Covariance Determinant (FastMCD).
    #[serde(rename_all = "kebab-case")]
    RobustGaussian {
        /// Share of training rows the MCD covers (default ⌊(m+p+1)/2⌋/m).
        #[serde(default)]
        support_fraction: Option<f64>,
        /// Seed of the random starts (default 1).
        #[serde(default = "one")]
        seed: u64,
    },
    /// A mixture of Gaussians with full covariances, k chosen by BIC.
    #[serde(rename_all = "kebab-case")]
    GaussianMixture {
        /// Smallest k (default 1).
        #[serde(default = "one_usize")]
        k_min: usize,
        /// Largest k (default 5, at most 20).
        #[serde(default = "five")]
        #[schemars(range(max = 20))]
        k_max: usize,
        /// Seed of the k-means++ starts (default 1).
        #[serde(default = "one")]
        seed: u64,
        /// Variance floor relative to each feature's training variance (default 1e-6).
        #[serde(default = "floor")]
        covariance_floor: f64,
    },
    /// Distance to the k-th nearest training row, read as a density.
    KnnDistance {
        /// k (default 5, at most 1,000).
        #[serde(default = "five")]
        #[schemars(range(min = 1, max = 1_000))]
        k: usize,
    },
    /// An external program (`command:` in the spec), by its place in
    /// `Plan::commands`; never read from YAML in this form.
    #[serde(skip)]
    Command(usize),
}

impl DetectorKind {
    /// The detector's name in specs, files and cards.
    pub fn name(self) -> &'static str {
        match self {
            DetectorKind::IndependentGaussian => "independent-gaussian",
            DetectorKind::MultivariateGaussian => "multivariate-gaussian",
            DetectorKind::RobustGaussian { .. } => "robust-gaussian",
            DetectorKind::GaussianMixture { .. } => "gaussian-mixture",
            DetectorKind::KnnDistance { .. } => "knn-distance",
            DetectorKind::Command(_) => "command",
        }
    }
}

/// A detector that is an external program: anomark hands it a folder with
/// the training rows' features and the rows to score, and reads back one
/// score per row (see the README's contract).
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawCommand {
    /// The candidate's name in the card and the record.
    pub name: String,
    /// The program and its arguments, run without a shell from the spec's
    /// folder; the exchange folder's path is added as the last argument.
    pub run: Vec<String>,
    /// Files the program depends on (its code, model files, weights),
    /// relative to the spec; their blake3 is recorded.
    #[serde(default)]
    pub inputs: Vec<String>,
    /// Seconds the program may run before it is killed (default 600, at most 86,400).
    #[serde(default = "six_hundred")]
    pub timeout_seconds: u64,
    /// The exchange files' format (default `csv`).
    #[serde(default)]
    pub io: CommandIo,
    /// Seed of the permutation that shuffles the rows to score (default 1).
    #[serde(default = "one")]
    pub seed: u64,
}

/// The format of the files exchanged with an external command.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, JsonSchema, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum CommandIo {
    /// `train.csv`, `rows.csv` and `scores.csv`.
    #[default]
    Csv,
    /// `train.parquet`, `rows.parquet` and `scores.parquet`.
    Parquet,
}

fn six_hundred() -> u64 {
    600
}

/// The one-key map `command: {...}`, for the schema.
#[derive(JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
#[allow(dead_code)]
pub struct CommandSchema {
    /// An external program as a detector.
    command: RawCommand,
}

fn one() -> u64 {
    1
}
fn one_usize() -> usize {
    1
}
fn five() -> usize {
    5
}
fn floor() -> f64 {
    1e-6
}

/// Detector names, for the schema of the plain-name form.
#[derive(JsonSchema)]
#[serde(rename_all = "kebab-case")]
#[allow(dead_code)]
pub enum DetectorName {
    /// See [`DetectorKind::IndependentGaussian`].
    IndependentGaussian,
    /// See [`DetectorKind::MultivariateGaussian`].
    MultivariateGaussian,
    /// See [`DetectorKind::RobustGaussian`].
    RobustGaussian,
    /// See [`DetectorKind::GaussianMixture`].
    GaussianMixture,
    /// See [`DetectorKind::KnnDistance`].
    KnnDistance,
}

/// The schema of a detector entry: a name, or a map with settings.
#[derive(JsonSchema)]
#[serde(untagged)]
#[allow(dead_code)]
pub enum DetectorSchema {
    /// A name, with default settings.
    Name(DetectorName),
    /// A name with settings.
    Spelled(DetectorKind),
    /// An external program.
    Command(CommandSchema),
}

/// One entry of `detectors`, read from a name or a map.
#[derive(Debug, Clone)]
pub enum RawDetector {
    /// A built-in detector.
    Builtin(DetectorKind),
    /// An external program.
    Command(RawCommand),
}

/// A map whose first key was already read: hands that key back first.
struct KeyFirst<A> {
    key: Option<String>,
    rest: A,
}

impl<'de, A: MapAccess<'de>> MapAccess<'de> for KeyFirst<A> {
    type Error = A::Error;
    fn next_key_seed<K: de::DeserializeSeed<'de>>(
        &mut self,
        seed: K,
    ) -> Result<Option<K::Value>, A::Error> {
        match self.key.take() {
            Some(k) => seed
                .deserialize(de::value::StringDeserializer::<A::Error>::new(k))
                .map(Some),
            None => self.rest.next_key_seed(seed),
        }
    }
    fn next_value_seed<V: de::DeserializeSeed<'de>>(
        &mut self,
        seed: V,
    ) -> Result<V::Value, A::Error> {
        self.rest.next_value_seed(seed)
    }
}

impl<'de> Deserialize<'de> for RawDetector {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = RawDetector;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a detector name, or a map from a detector name to its settings")
            }
            fn visit_str<E: de::Error>(self, s: &str) -> Result<RawDetector, E> {
                let kind = match s {
                    "robust-gaussian" => DetectorKind::RobustGaussian {
                        support_fraction: None,
                        seed: one(),
                    },
                    "gaussian-mixture" => DetectorKind::GaussianMixture {
                        k_min: one_usize(),
                        k_max: five(),
                        seed: one(),
                        covariance_floor: floor(),
                    },
                    "knn-distance" => DetectorKind::KnnDistance { k: five() },
                    other => {
                        DetectorKind::deserialize(de::value::StrDeserializer::<E>::new(other))?
                    }
                };
                Ok(RawDetector::Builtin(kind))
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<RawDetector, A::Error> {
                let key: Option<String> = map.next_key()?;
                if key.as_deref() == Some("command") {
                    let c: RawCommand = map.next_value()?;
                    if let Some(other) = map.next_key::<String>()? {
                        return Err(de::Error::custom(format!(
                            "a detector is a one-key map; found `{other}` beside `command`"
                        )));
                    }
                    return Ok(RawDetector::Command(c));
                }
                DetectorKind::deserialize(de::value::MapAccessDeserializer::new(KeyFirst {
                    key,
                    rest: map,
                }))
                .map(RawDetector::Builtin)
            }
        }
        d.deserialize_any(V)
    }
}

/// How a threshold is chosen on validation.
#[derive(Debug, Clone, Copy, Default, PartialEq, Deserialize, JsonSchema, serde::Serialize)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub enum ThresholdPolicy {
    /// The threshold with the highest F1 on validation.
    #[default]
    MaxF1,
    /// The threshold with the highest Fβ (β > 1 weighs recall more).
    MaxFBeta {
        /// β > 0.
        beta: f64,
    },
    /// The highest recall whose false-positive rate on validation normals is
    /// at most the budget.
    #[serde(rename_all = "kebab-case")]
    AlarmBudget {
        /// The largest acceptable false-positive rate, in [0, 1].
        max_false_positive_rate: f64,
    },
    /// A conformal threshold: flag a row when its conformal p-value against
    /// the validation normals is at most A, which keeps the false-alarm rate
    /// of new normal rows at most A (exchangeability assumed).
    #[serde(rename_all = "kebab-case")]
    Conformal {
        /// A, the largest acceptable false-alarm rate, in (0, 1); at least
        /// 1 / (n + 1) for n validation normals.
        max_false_positive_rate: f64,
    },
    /// The lowest false-positive rate whose recall is at least the target.
    #[serde(rename_all = "kebab-case")]
    RecallTarget {
        /// The smallest acceptable recall, in [0, 1].
        min_recall: f64,
    },
    /// The highest recall whose precision is at least the target.
    #[serde(rename_all = "kebab-case")]
    PrecisionTarget {
        /// The smallest acceptable precision, in [0, 1].
        min_precision: f64,
    },
    /// The lowest expected cost: missed anomalies and false alarms, each at its cost.
    #[serde(rename_all = "kebab-case")]
    MinCost {
        /// Cost of one missed anomaly.
        missed_anomaly: f64,
        /// Cost of one false alarm.
        false_alarm: f64,
    },
    /// A threshold declared by the user: τ, or ln ε (= −τ).
    #[serde(rename_all = "kebab-case")]
    Fixed {
        /// τ: flag iff s(x) > τ.
        #[serde(default)]
        tau: Option<f64>,
        /// ln ε: flag iff ln p(x) < ln ε.
        #[serde(default)]
        ln_epsilon: Option<f64>,
    },
}

/// How candidates are ranked on validation.
#[derive(Debug, Clone, Copy, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawSelection {
    /// The validation metric; higher is better.
    pub metric: SelectionMetric,
}

/// A validation metric that ranks candidates.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, JsonSchema, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum SelectionMetric {
    /// F1 at each candidate's threshold.
    #[default]
    F1,
    /// Fβ at each candidate's threshold (β of the `max-f-beta` policy).
    FBeta,
    /// Precision at each candidate's threshold.
    Precision,
    /// Recall at each candidate's threshold.
    Recall,
    /// Matthews correlation at each candidate's threshold.
    Mcc,
    /// Balanced accuracy at each candidate's threshold.
    BalancedAccuracy,
    /// Average precision (threshold-free).
    AveragePrecision,
    /// ROC AUC (threshold-free).
    RocAuc,
}

/// The bootstrap's size and seed.
#[derive(Debug, Clone, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawBootstrap {
    /// Replicates (default 1000, at most 100,000; 0 turns the bootstrap intervals off).
    #[serde(default = "default_replicates")]
    #[schemars(with = "u32", range(max = 100_000))]
    pub replicates: Spanned<u32>,
    /// Seed (default 1).
    #[serde(default = "default_boot_seed")]
    pub seed: u64,
}

fn default_replicates() -> Spanned<u32> {
    let nowhere = serde_saphyr::Location::UNKNOWN;
    Spanned::new(1000, nowhere, nowhere)
}

fn default_boot_seed() -> u64 {
    1
}

/// Text for the model card.
#[derive(Debug, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawCard {
    /// Card title.
    #[schemars(with = "String")]
    pub title: Spanned<String>,
    /// Who answers for the detector.
    pub owner: String,
    /// What the detector is for.
    pub intended_use: String,
    /// Uses it is not meant for.
    #[serde(default)]
    pub out_of_scope_uses: Vec<String>,
    /// A wrong decision can hurt someone: the card then carries a safety caution.
    #[serde(default)]
    pub safety_relevant: bool,
    /// The caution's wording, when the default does not name the local inspection.
    #[serde(default)]
    pub safety_caution: Option<String>,
}
