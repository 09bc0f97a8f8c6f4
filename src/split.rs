//! Seeded assignment of rows to train, validation and test.
//!
//! No clock and no global randomness: in the protocol split a row's place
//! depends only on the seed and its content hash. Within each label the
//! distinct contents are ranked by `blake3(seed, content hash)` and the ranking
//! is cut at exact counts, so reordering the file changes nothing and identical
//! rows, which share a rank, cannot straddle two splits. The test rows are
//! handed on sealed: see [`SealedTest`].

use crate::audit::hash::ContentHash;
use crate::data::{Dataset, RowId};
use crate::error::{Error, Result};
use crate::spec::{Seed, SplitPlan};

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

/// Row counts of one split by label.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize)]
pub struct Counts {
    /// Normal rows.
    pub normal: usize,
    /// Anomalous rows.
    pub anomaly: usize,
}

/// Held-out rows. Opening consumes the value, so a run cannot look twice.
#[derive(Debug)]
pub struct SealedTest {
    rows: Vec<RowId>,
    counts: Counts,
}

impl SealedTest {
    /// How many rows of each label the test split holds (counting is not opening).
    pub fn counts(&self) -> Counts {
        self.counts
    }

    /// Opens the test split. Called from `pipeline` only, after selection.
    pub(crate) fn open(self) -> Vec<RowId> {
        self.rows
    }
}

/// How the split came out, for the record.
#[derive(Debug, Clone, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub struct SplitReport {
    /// `protocol` or `from-column`.
    pub method: &'static str,
    /// The seed (protocol split only).
    pub seed: Option<Seed>,
    /// The counts the fractions ask for, by split (protocol split only).
    #[serde(skip)]
    pub requested: Option<[Counts; 3]>,
    /// The counts obtained, by split.
    #[serde(skip)]
    pub counts: [Counts; 3],
    /// Rows that moved across a cut because an identical row was ranked on the
    /// other side of it.
    pub rows_moved_with_identical_rows: usize,
    /// Rows whose content is shared with at least one other row.
    pub rows_with_duplicates: usize,
}

/// The three splits. Each list is in canonical order (ascending content hash,
/// then row id), so that sums over it do not depend on the file's row order.
#[derive(Debug)]
pub struct Splits {
    /// Training rows (normal only).
    pub train: Vec<RowId>,
    /// Validation rows.
    pub validation: Vec<RowId>,
    /// Test rows, sealed.
    pub test: SealedTest,
    /// The record of how the split came out.
    pub report: SplitReport,
}

/// The sort key of a content under a seed (see the module docs).
pub fn rank_key(seed: Seed, row: &ContentHash) -> [u8; 32] {
    let mut h = blake3::Hasher::new();
    h.update(&seed.0.to_le_bytes());
    h.update(&row.0);
    *h.finalize().as_bytes()
}

/// Exact counts for `n` items and fractions that sum to 1, by largest
/// remainder: each part gets the floor of its share, and the rows left over go
/// one each to the parts with the largest fractional remainders (ties to the
/// earlier part). So 10,000 at 0.6/0.2/0.2 gives exactly 6,000/2,000/2,000 and
/// 25 at 0.5/0.5 gives 13/12.
pub fn exact_counts(n: usize, fractions: &[f64]) -> Vec<usize> {
    let shares: Vec<f64> = fractions.iter().map(|f| f * n as f64).collect();
    let mut counts: Vec<usize> = shares.iter().map(|s| s.floor() as usize).collect();
    let assigned: usize = counts.iter().sum();
    let mut left = n.saturating_sub(assigned);
    let mut order: Vec<usize> = (0..fractions.len()).collect();
    order.sort_by(|&a, &b| {
        let ra = shares[a] - shares[a].floor();
        let rb = shares[b] - shares[b].floor();
        rb.total_cmp(&ra).then(a.cmp(&b))
    });
    for &i in order.iter().cycle() {
        if left == 0 {
            break;
        }
        if fractions[i] > 0.0 {
            counts[i] += 1;
            left -= 1;
        }
    }
    counts
}

/// Assigns every row to a split.
pub fn assign(plan: &SplitPlan, data: &Dataset, hashes: &[ContentHash]) -> Result<Splits> {
    let n = data.len();
    // Distinct contents with their multiplicity and label (the label is part of
    // the content, so every row with one hash has the same label).
    let mut multiplicity = std::collections::BTreeMap::<ContentHash, (usize, bool)>::new();
    for (h, &a) in hashes.iter().zip(&data.is_anomaly) {
        multiplicity.entry(*h).or_insert((0, a)).0 += 1;
    }
    let rows_with_duplicates = hashes.iter().filter(|h| multiplicity[h].0 > 1).count();

    let mut part_of = vec![Part::Train; n];
    let (seed, requested, moved) = match plan {
        SplitPlan::Protocol {
            seed,
            normal,
            anomaly,
        } => {
            let mut requested = [Counts::default(); 3];
            let mut moved = 0;
            for label in [false, true] {
                let (parts, fractions): (Vec<Part>, Vec<f64>) = if label {
                    (vec![Part::Validation, Part::Test], anomaly.to_vec())
                } else {
                    (Part::ALL.to_vec(), normal.to_vec())
                };
                let mut groups: Vec<(ContentHash, usize)> = multiplicity
                    .iter()
                    .filter(|(_, &(_, a))| a == label)
                    .map(|(h, &(m, _))| (*h, m))
                    .collect();
                let total: usize = groups.iter().map(|g| g.1).sum();
                let counts = exact_counts(total, &fractions);
                for (p, c) in parts.iter().zip(&counts) {
                    let slot = &mut requested[*p as usize];
                    if label {
                        slot.anomaly = *c;
                    } else {
                        slot.normal = *c;
                    }
                }
                groups.sort_by_cached_key(|(h, _)| (rank_key(*seed, h), *h));
                // Each group goes whole to the part in which its first row falls.
                let mut cuts = Vec::with_capacity(counts.len());
                let mut acc = 0;
                for c in &counts {
                    acc += c;
                    cuts.push(acc);
                }
                let mut position = 0;
                let mut assigned = std::collections::BTreeMap::<ContentHash, Part>::new();
                for (h, m) in &groups {
                    let k = cuts
                        .iter()
                        .position(|&c| position < c)
                        .unwrap_or(cuts.len() - 1);
                    let end = position + m;
                    if end > cuts[k] {
                        moved += end - cuts[k];
                    }
                    assigned.insert(*h, parts[k]);
                    position = end;
                }
                for (i, h) in hashes.iter().enumerate() {
                    if data.is_anomaly[i] == label {
                        part_of[i] = assigned[h];
                    }
                }
            }
            (Some(*seed), Some(requested), moved)
        }
        SplitPlan::FromColumn(c) => {
            let values = data
                .split_column
                .as_ref()
                .ok_or_else(|| Error::internal("split column was not loaded"))?;
            let mut bad = Vec::new();
            for (i, v) in values.iter().enumerate() {
                part_of[i] = match v.as_str() {
                    "train" => Part::Train,
                    "validation" => Part::Validation,
                    "test" => Part::Test,
                    _ => {
                        bad.push(i);
                        Part::Train
                    }
                };
            }
            if !bad.is_empty() {
                return Err(Error::Data {
                    path: data.path.clone(),
                    column: Some(c.name.clone()),
                    message: format!(
                        "split value `{}` is not one of `train`, `validation`, `test`",
                        values[bad[0]]
                    ),
                    lines: bad
                        .iter()
                        .take(5)
                        .map(|&i| RowId(i as u64).line())
                        .collect(),
                    total: bad.len(),
                });
            }
            let known_in_train: Vec<usize> = (0..n)
                .filter(|&i| data.is_anomaly[i] && part_of[i] == Part::Train)
                .collect();
            if !known_in_train.is_empty() {
                return Err(Error::Data {
                    path: data.path.clone(),
                    column: Some(c.name.clone()),
                    message: "a known anomaly is assigned to `train`; detectors are fitted on \
                              normal rows only, so known anomalies belong in validation and test"
                        .into(),
                    lines: known_in_train
                        .iter()
                        .take(5)
                        .map(|&i| RowId(i as u64).line())
                        .collect(),
                    total: known_in_train.len(),
                });
            }
            (None, None, 0)
        }
    };

    let mut lists: [Vec<RowId>; 3] = Default::default();
    let mut counts = [Counts::default(); 3];
    for (i, p) in part_of.iter().enumerate() {
        lists[*p as usize].push(RowId(i as u64));
        if data.is_anomaly[i] {
            counts[*p as usize].anomaly += 1;
        } else {
            counts[*p as usize].normal += 1;
        }
    }
    for list in lists.iter_mut() {
        list.sort_by_key(|r| (hashes[r.0 as usize], *r));
    }
    crate::audit::leak::check(&lists, hashes)?;
    check_counts(&counts)?;

    let [train, validation, test] = lists;
    Ok(Splits {
        train,
        validation,
        test: SealedTest {
            rows: test,
            counts: counts[2],
        },
        report: SplitReport {
            method: match plan {
                SplitPlan::Protocol { .. } => "protocol",
                SplitPlan::FromColumn(_) => "from-column",
            },
            seed,
            requested,
            counts,
            rows_moved_with_identical_rows: moved,
            rows_with_duplicates,
        },
    })
}

fn check_counts(counts: &[Counts; 3]) -> Result<()> {
    for p in [Part::Validation, Part::Test] {
        let c = counts[p as usize];
        if c.normal == 0 || c.anomaly == 0 {
            return Err(Error::Protocol {
                message: format!(
                    "the `{}` split holds {} normal and {} anomalous rows; validation and test \
                     each need at least one of both (add labelled anomalies, or change the \
                     fractions)",
                    p.name(),
                    c.normal,
                    c.anomaly
                ),
            });
        }
    }
    let train = counts[Part::Train as usize];
    if train.normal < 2 {
        return Err(Error::Protocol {
            message: format!(
                "the `train` split holds {} normal rows; at least 2 are needed to fit anything",
                train.normal
            ),
        });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn largest_remainder_counts() {
        assert_eq!(exact_counts(10_000, &[0.6, 0.2, 0.2]), [6000, 2000, 2000]);
        assert_eq!(exact_counts(20, &[0.5, 0.5]), [10, 10]);
        assert_eq!(exact_counts(25, &[0.5, 0.5]), [13, 12]);
        assert_eq!(exact_counts(7, &[0.6, 0.2, 0.2]), [4, 2, 1]);
        assert_eq!(exact_counts(3, &[1.0, 0.0, 0.0]), [3, 0, 0]);
    }
}
