//! `Part`, the three splits: the lowest layer, importing nothing, so that
//! the row rules (`rules`), the leakage proof (`audit::leak`, which
//! re-exports it) and the split (`split`) can all name a split without
//! importing one another.

/// One of the three splits.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Part {
    /// Fits the detectors.
    Train,
    /// Chooses thresholds and the detector.
    Validation,
    /// Held out for the final numbers.
    Test,
}

impl Part {
    /// All parts, in order.
    pub const ALL: [Part; 3] = [Part::Train, Part::Validation, Part::Test];

    /// The name used in files and specs.
    pub fn name(self) -> &'static str {
        match self {
            Part::Train => "train",
            Part::Validation => "validation",
            Part::Test => "test",
        }
    }
}
