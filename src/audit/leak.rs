//! Proves that no row content sits in two splits, by row id and by content
//! hash, and refuses the run if it does.
//!
//! This runs for every split method: for the protocol split it is a second,
//! independent check of what the split construction promises.

use std::collections::BTreeMap;

use crate::audit::hash::ContentHash;
use crate::data::RowId;
use crate::error::{Error, Result};

const NAMES: [&str; 3] = ["train", "validation", "test"];

/// Checks that the three row lists (train, validation, test) share no row id
/// and no content hash.
pub fn check(lists: &[Vec<RowId>; 3], hashes: &[ContentHash]) -> Result<()> {
    // First part in which each content appears, with its first row there.
    let mut seen: BTreeMap<ContentHash, (usize, RowId)> = BTreeMap::new();
    let mut ids = vec![false; hashes.len()];
    // Shared contents per pair of parts, with the first pair of rows found.
    let mut shared: BTreeMap<(usize, usize), (usize, (RowId, RowId))> = BTreeMap::new();
    for (p, list) in lists.iter().enumerate() {
        let mut here: BTreeMap<ContentHash, RowId> = BTreeMap::new();
        for &r in list {
            let i = r.0 as usize;
            if ids[i] {
                return Err(Error::internal(format!(
                    "row {i} was assigned to two splits"
                )));
            }
            ids[i] = true;
            here.entry(hashes[i]).or_insert(r);
        }
        for (h, r) in here {
            match seen.get(&h) {
                Some(&(q, first)) => {
                    let e = shared.entry((q, p)).or_insert((0, (first, r)));
                    e.0 += 1;
                    if (first, r) < e.1 {
                        e.1 = (first, r);
                    }
                }
                None => {
                    seen.insert(h, (p, r));
                }
            }
        }
    }
    if let Some((&(a, b), &(count, (ra, rb)))) = shared.iter().next() {
        return Err(Error::Leakage {
            splits: (NAMES[a].into(), NAMES[b].into()),
            overlapping: count,
            first: (ra.line(), rb.line()),
        });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::audit::hash::row;

    #[test]
    fn shared_content_is_leakage() {
        let hashes = vec![
            row([1.0], false, 1),
            row([2.0], false, 1),
            row([1.0], false, 1),
        ];
        let lists = [vec![RowId(1)], vec![RowId(0)], vec![RowId(2)]];
        match check(&lists, &hashes) {
            Err(Error::Leakage {
                splits,
                overlapping,
                first,
            }) => {
                assert_eq!(splits, ("validation".into(), "test".into()));
                assert_eq!(overlapping, 1);
                assert_eq!(first, (2, 4));
            }
            other => panic!("expected leakage, got {other:?}"),
        }
    }

    #[test]
    fn disjoint_contents_pass() {
        let hashes = vec![
            row([1.0], false, 1),
            row([2.0], false, 1),
            row([3.0], true, 1),
        ];
        let lists = [vec![RowId(0)], vec![RowId(1)], vec![RowId(2)]];
        assert!(check(&lists, &hashes).is_ok());
    }
}
