//! The first stage: the rows, their content hashes and the splits (with the
//! leakage proof), whichever way the rows arrive.
//!
//! A way of reading is an [`Ingest`]: [`InMemory`] reads every row
//! (`data::load`, `audit::hash::rows`, `split::assign`), [`Streaming`] reads
//! the source in bounded chunks and keeps of the training rows only their
//! moments and a systematic sample for the figures and the drift reference
//! (`stream::load`, `split::streamed`). Both return the same [`Ingested`],
//! which every later stage reads; [`reader`] picks one for a plan. Another
//! way of reading rows (an engine) is one more type implementing [`Ingest`]
//! and one more arm in [`reader`]: no later stage changes. Such a reader
//! refuses rows through [`crate::rules`] (so its words are the others'),
//! and may hand over the training rows as moments, building its splits with
//! `split::streamed` from the held rows' parts and the training rows'
//! sorted content hashes, as [`Streaming`] does.

use std::collections::BTreeMap;

use crate::audit::hash::{self, ContentHash};
use crate::audit::leak::Part;
use crate::data::{self, Dataset, RowId};
use crate::error::Result;
use crate::features::FittedFeatures;
use crate::moments::Moments;
use crate::progress::Progress;
use crate::spec::Plan;
use crate::split::{self, Counts, SealedTest, SplitReport};

/// How the training rows reached the fit.
pub enum Training {
    /// Every training row is held in [`Rows::data`] (the rows [`Rows::train`]).
    Rows,
    /// The training rows were summarised and dropped: per feature set, the
    /// fitted (parameter-free) features and the rows' moments, the train
    /// manifest computed while they passed, and a systematic sample of them
    /// kept for the figures and the drift reference.
    Moments {
        /// Per feature set, its fitted features.
        fitted: Vec<FittedFeatures>,
        /// Per feature set, the training rows' moments.
        moments: Vec<Moments>,
        /// The train split's manifest hash.
        manifest: String,
        /// How many training rows there were.
        rows: usize,
        /// The sampled training rows (source columns), in content-hash order.
        sample: Box<Dataset>,
        /// The rows of `sample` for each of [`SAMPLE_LIMITS`].
        samples: Vec<Vec<RowId>>,
    },
}

/// The rows a run works on, split: everything but the sealed test split.
pub struct Rows {
    /// The rows held (all of them, or validation and test when streamed).
    pub data: Dataset,
    /// The content hash of each held row.
    pub hashes: Vec<ContentHash>,
    /// The training rows held (empty when streamed), in content-hash order.
    pub train: Vec<RowId>,
    /// The validation rows, in content-hash order.
    pub validation: Vec<RowId>,
    /// How the split came out.
    pub report: SplitReport,
    /// How the training rows reach the fit.
    pub training: Training,
    /// Where the validation and test rows are scored.
    pub held: super::held::Held,
}

/// What the ingest stage returns: the rows and the sealed test split.
pub struct Ingested {
    /// The rows, split.
    pub rows: Rows,
    /// The test rows, sealed until the test opening.
    pub test: SealedTest,
}

/// The sample sizes a reader that drops the training rows keeps them for:
/// the feature figures' ([`FIGURES`]) and the drift reference's ([`DRIFT`]).
pub const SAMPLE_LIMITS: [usize; 2] = [FIGURE_ROWS, crate::record::DRIFT_SAMPLE_ROWS];

/// At most this many training rows feed each feature figure (a systematic
/// sample above).
pub const FIGURE_ROWS: usize = 200_000;

/// Which of [`SAMPLE_LIMITS`] the feature figures use.
pub const FIGURES: usize = 0;

/// Which of [`SAMPLE_LIMITS`] the drift reference uses.
pub const DRIFT: usize = 1;

/// A way of reading a plan's rows into [`Ingested`].
pub trait Ingest {
    /// Reads, hashes and splits the rows the plan names.
    fn ingest(&self, plan: &Plan, progress: &Progress) -> Result<Ingested>;
}

/// Every row read into memory.
pub struct InMemory;

/// The source read in bounded chunks (`data.stream: true`).
pub struct Streaming;

/// The way of reading `plan` asks for.
pub fn reader(plan: &Plan) -> Box<dyn Ingest> {
    if plan.stream {
        Box::new(Streaming)
    } else {
        Box::new(InMemory)
    }
}

/// The content hashes and the splits (with the leakage proof) of rows
/// already read: the one place where rows in memory are hashed and split
/// (for [`InMemory`], `check`'s preview and `diff`'s row moves).
pub fn hash_and_split(
    plan: &Plan,
    data: &Dataset,
    progress: &Progress,
) -> Result<(Vec<ContentHash>, split::Splits)> {
    let stage = progress.stage(format!("hashing {} rows", data.len()));
    let hashes = hash::rows(&data.x, &data.is_anomaly);
    drop(stage);
    let stage = progress.stage("splitting and checking for leakage");
    let splits = split::assign(&plan.split, data, &hashes)?;
    drop(stage);
    Ok((hashes, splits))
}

impl Ingest for InMemory {
    fn ingest(&self, plan: &Plan, progress: &Progress) -> Result<Ingested> {
        let stage = progress.stage("reading the data");
        let data = data::load(plan)?;
        drop(stage);
        let (hashes, splits) = hash_and_split(plan, &data, progress)?;
        Ok(Ingested::of(data, hashes, splits, Training::Rows))
    }
}

impl Ingest for Streaming {
    fn ingest(&self, plan: &Plan, progress: &Progress) -> Result<Ingested> {
        let s = crate::stream::load(plan, progress, &SAMPLE_LIMITS)?;
        let stage = progress.stage("splitting and checking for leakage");
        let splits = split::streamed(
            &s.data,
            &s.hashes,
            &s.parts,
            &s.train_hashes,
            s.train_counts,
        )?;
        drop(stage);
        let training = Training::Moments {
            fitted: s.fitted,
            moments: s.moments,
            manifest: hash::manifest_of_sorted(s.train_hashes.iter()),
            rows: s.train_hashes.len(),
            sample: Box::new(s.train_sample),
            samples: s.samples,
        };
        Ok(Ingested::of(s.data, s.hashes, splits, training))
    }
}

impl Ingested {
    /// The stage's result from rows read, their hashes, their splits and
    /// the training rows (held, or summarised by the reader).
    pub(crate) fn of(
        data: Dataset,
        hashes: Vec<ContentHash>,
        splits: split::Splits,
        training: Training,
    ) -> Self {
        let split::Splits {
            train,
            validation,
            test,
            report,
        } = splits;
        Ingested {
            rows: Rows {
                data,
                hashes,
                train,
                validation,
                report,
                training,
                held: super::held::Held::Rows,
            },
            test,
        }
    }

    /// Each split's manifest hash by split name.
    pub fn manifests(&self) -> BTreeMap<String, String> {
        let r = &self.rows;
        // Each list is in canonical (content hash, row) order; its hashes
        // are gathered on all cores into one run of memory, the two lists
        // side by side.
        let of = |rows: &[RowId]| {
            use rayon::prelude::*;
            let hs: Vec<ContentHash> = rows
                .par_iter()
                .map(|r| self.rows.hashes[r.0 as usize])
                .collect();
            hash::manifest_of_sorted_slice(&hs)
        };
        let (train, validation) = rayon::join(|| of(&r.train), || of(&r.validation));
        let mut manifests: BTreeMap<String, String> = [
            (Part::Train.name().to_string(), train),
            (Part::Validation.name().to_string(), validation),
        ]
        .into_iter()
        .collect();
        manifests.insert(Part::Test.name().into(), self.test.manifest().to_string());
        if let Training::Moments { manifest, .. } = &r.training {
            manifests.insert(Part::Train.name().into(), manifest.clone());
        }
        if let super::held::Held::Engine(e) = &r.held {
            manifests.insert(
                Part::Validation.name().into(),
                e.validation_manifest().to_string(),
            );
        }
        manifests
    }

    /// The test split's counts by label, readable while it is sealed.
    pub fn test_counts(&self) -> Counts {
        self.test.counts()
    }
}

impl Rows {
    /// Whether the training rows were streamed, not kept.
    pub fn streamed(&self) -> bool {
        matches!(self.training, Training::Moments { .. })
    }

    /// The labels of the validation rows, in their order.
    pub fn validation_labels(&self) -> Vec<bool> {
        self.labels(&self.validation)
    }

    /// The labels of `rows`, in their order.
    pub fn labels(&self, rows: &[RowId]) -> Vec<bool> {
        rows.iter()
            .map(|r| self.data.is_anomaly[r.0 as usize])
            .collect()
    }

    /// How many training rows there were.
    pub fn train_rows(&self) -> usize {
        match &self.training {
            Training::Moments { rows, .. } => *rows,
            Training::Rows => self.train.len(),
        }
    }

    /// A systematic sample of the training rows for the limit
    /// `SAMPLE_LIMITS[which]`: every k-th in content-hash order, k = ⌈rows /
    /// limit⌉, taken from the rows held, or kept by the reader that dropped
    /// them. Returns the rows' dataset, the sampled rows and k.
    pub fn train_sample(&self, which: usize) -> (&Dataset, Vec<RowId>, usize) {
        let stride = self.train_rows().div_ceil(SAMPLE_LIMITS[which]).max(1);
        match &self.training {
            Training::Moments {
                sample, samples, ..
            } => (sample, samples[which].clone(), stride),
            Training::Rows => (
                &self.data,
                self.train.iter().copied().step_by(stride).collect(),
                stride,
            ),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The contract every reader keeps: the same file read whole and
    /// streamed gives the same splits (the same contents in the same
    /// canonical order, the same counts) and the same manifests. Invented
    /// rows, for this check only.
    #[test]
    fn in_memory_and_streamed_ingest_agree_on_the_splits() {
        let dir = tempfile::tempdir().unwrap();
        let mut csv = String::from("id,a,b,label,split\n");
        for i in 0..60u32 {
            // Row 7 repeats row 6 (content, label, split): copies stay together.
            let v = if i == 7 { 6 } else { i };
            let anomaly = v % 10 == 3;
            let split = match (anomaly, v % 5) {
                (true, _) if (v / 10) % 2 == 0 => "validation",
                (true, _) => "test",
                (false, 0) => "validation",
                (false, 1) => "test",
                _ => "train",
            };
            let label = if anomaly { "bad" } else { "ok" };
            csv.push_str(&format!(
                "r{i},{}.5,{},{label},{split}\n",
                v * 7 % 13,
                v * 3 % 11
            ));
        }
        std::fs::write(dir.path().join("data.csv"), csv).unwrap();
        let spec = |stream: bool| {
            format!(
                "format: 1\ndata:\n  path: data.csv\n  id-column: id\n  stream: {stream}\n  \
                 label:\n    column: label\n    normal: ok\n    anomaly: bad\n  features: [a, \
                 b]\nsplit:\n  from-column: split\ndetectors: [independent-gaussian]\n\
                 threshold: max-f1\ncard:\n  title: t\n  owner: o\n  intended-use: u\n"
            )
        };
        let hidden = Progress::hidden();
        let read = |stream: bool| {
            let path = dir.path().join(format!("spec-{stream}.yaml"));
            let plan = crate::spec::parse(&path, spec(stream).into_bytes()).unwrap();
            reader(&plan).ingest(&plan, &hidden).unwrap()
        };
        let (whole, streamed) = (read(false), read(true));
        assert!(!whole.rows.streamed() && streamed.rows.streamed());
        let contents = |i: &Ingested| -> Vec<ContentHash> {
            i.rows
                .validation
                .iter()
                .map(|r| i.rows.hashes[r.0 as usize])
                .collect()
        };
        assert_eq!(contents(&whole), contents(&streamed));
        assert_eq!(
            whole.test.contents(&whole.rows.hashes),
            streamed.test.contents(&streamed.rows.hashes)
        );
        assert_eq!(whole.rows.report.counts, streamed.rows.report.counts);
        assert_eq!(whole.manifests(), streamed.manifests());
        assert_eq!(whole.test_counts(), streamed.test_counts());
    }
}
