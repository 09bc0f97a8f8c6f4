//! `RawSpec`: the YAML spec exactly as written, for serde and schemars.
//!
//! Nothing here checks meaning (fractions that sum to one, distinct columns):
//! that is [`super::resolve`]'s job. Fields whose later checks need a position
//! are [`Spanned`], so an error can point at the value itself.

use schemars::JsonSchema;
use serde::Deserialize;
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
    #[schemars(with = "Vec<DetectorKind>")]
    pub detectors: Spanned<Vec<DetectorKind>>,
    /// How each candidate's threshold is chosen on validation.
    #[serde(default)]
    pub threshold: ThresholdPolicy,
    /// Text for the model card.
    pub card: RawCard,
    /// Default output directory, relative to the spec file (`--out` overrides it).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub output: Option<Spanned<String>>,
}

/// One labelled CSV source.
#[derive(Debug, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub struct RawData {
    /// CSV file, relative to the spec file.
    #[schemars(with = "String")]
    pub path: Spanned<String>,
    /// The label column and its two values.
    pub label: RawLabel,
    /// An optional column that identifies each row (echoed in scores.csv).
    #[serde(default)]
    #[schemars(with = "Option<String>")]
    pub id_column: Option<Spanned<String>>,
    /// The numeric feature columns, in the order the detectors see them.
    #[schemars(with = "Vec<String>")]
    pub features: Spanned<Vec<Spanned<String>>>,
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

/// The split: the seeded protocol split, or a column that fixes it.
#[derive(Debug, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub enum RawSplit {
    /// Seeded, stratified, content-hashed split of the labelled rows.
    Protocol(RawProtocol),
    /// A column whose values are `train`, `validation` or `test`.
    #[schemars(with = "String")]
    FromColumn(Spanned<String>),
}

/// The protocol split's seed and fractions.
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

/// A candidate detector.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub enum DetectorKind {
    /// One Gaussian per feature, features treated as independent.
    IndependentGaussian,
    /// One Gaussian over all features with a full covariance.
    MultivariateGaussian,
}

/// How a threshold is chosen on validation.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize, JsonSchema)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub enum ThresholdPolicy {
    /// The threshold with the highest F1 on validation.
    #[default]
    MaxF1,
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
