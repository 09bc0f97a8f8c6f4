//! Proves that no row content sits in two splits, by row id and by content
//! hash, and (with a group column) that no group does; refuses the run if not.
//!
//! This runs for every split method: for the seeded methods it is a second,
//! independent check of what the split construction promises.

use std::collections::BTreeMap;

use rayon::slice::ParallelSliceMut;

use crate::audit::hash::ContentHash;
use crate::data::{Dataset, RowId};
use crate::error::{Error, Result};

pub use crate::part::Part;

const NAMES: [&str; 3] = ["train", "validation", "test"];

/// Checks that the three row lists (train, validation, test) share no row id
/// and no content hash.
pub fn check(lists: &[Vec<RowId>; 3], hashes: &[ContentHash], data: &Dataset) -> Result<()> {
    let mut ids = vec![false; hashes.len()];
    // (content, part, row) for every row, sorted: equal contents are adjacent.
    let mut all: Vec<(ContentHash, u8, RowId)> = Vec::with_capacity(hashes.len());
    for (p, list) in lists.iter().enumerate() {
        for &r in list {
            let i = r.0 as usize;
            if ids[i] {
                return Err(Error::internal(format!(
                    "row {i} was assigned to two splits"
                )));
            }
            ids[i] = true;
            all.push((hashes[i], p as u8, r));
        }
    }
    all.par_sort_unstable();
    // Per pair (first part holding a content, a later part holding it too):
    // the number of shared contents and the smallest pair of rows.
    let mut shared = Shared::new();
    let mut i = 0;
    while i < all.len() {
        let mut j = i;
        while j < all.len() && all[j].0 == all[i].0 {
            j += 1;
        }
        // Sorted by part, then row: the first entry of each part is its smallest row.
        let (q, first) = (all[i].1 as usize, all[i].2);
        let mut k = i;
        while k < j {
            let p = all[k].1 as usize;
            if p != q {
                let e = shared.entry((q, p)).or_insert((0, (first, all[k].2)));
                e.0 += 1;
                if (first, all[k].2) < e.1 {
                    e.1 = (first, all[k].2);
                }
            }
            while k < j && all[k].1 as usize == p {
                k += 1;
            }
        }
        i = j;
    }
    verdict(&shared, data)
}

/// [`check`] for rows in canonical order ([`crate::audit::hash::order`]),
/// with each row's split in `part_of`: only the runs of repeated content are
/// read, no further sort.
pub fn check_sorted(
    order: &crate::audit::hash::Order,
    part_of: &[Part],
    data: &Dataset,
) -> Result<()> {
    let mut shared = Shared::new();
    for run in &order.repeats {
        // The smallest row of each split holding this content (rows ascend here).
        let mut first: [Option<RowId>; 3] = [None; 3];
        for &r in &order.rows[run.clone()] {
            let p = part_of[r as usize] as usize;
            first[p].get_or_insert(RowId(u64::from(r)));
        }
        if let Some(q) = (0..3).find(|&q| first[q].is_some()) {
            for p in q + 1..3 {
                if let (Some(a), Some(b)) = (first[q], first[p]) {
                    let e = shared.entry((q, p)).or_insert((0, (a, b)));
                    e.0 += 1;
                    if (a, b) < e.1 {
                        e.1 = (a, b);
                    }
                }
            }
        }
    }
    verdict(&shared, data)
}

/// Per pair of splits (first holding a content, later holding it too): the
/// number of shared contents and the smallest pair of rows.
type Shared = BTreeMap<(usize, usize), (usize, (RowId, RowId))>;

/// The leakage error for the first pair of splits that share content, if any.
fn verdict(shared: &Shared, data: &Dataset) -> Result<()> {
    match shared.iter().next() {
        Some((&(a, b), &(count, (ra, rb)))) => Err(Error::Leakage {
            splits: (NAMES[a].into(), NAMES[b].into()),
            overlapping: count,
            first: (data.place(ra), data.place(rb)),
        }),
        None => Ok(()),
    }
}

/// Checks that every group (a value of `column`) sits in one split.
pub fn check_groups(
    parts: &[Part],
    groups: &crate::data::TextColumn,
    column: &str,
    data: &Dataset,
) -> Result<()> {
    let mut first: BTreeMap<&str, (Part, usize)> = BTreeMap::new();
    let mut split_groups: BTreeMap<&str, (usize, usize)> = BTreeMap::new();
    for (i, g) in groups.iter().enumerate() {
        match first.get(g) {
            Some(&(p, j)) if p != parts[i] => {
                split_groups.entry(g).or_insert((j, i));
            }
            Some(_) => {}
            None => {
                first.insert(g, (parts[i], i));
            }
        }
    }
    if let Some((g, &(j, i))) = split_groups.iter().next() {
        return Err(Error::Data {
            path: data.files[data.origin[j].file as usize]
                .shown
                .clone()
                .into(),
            column: Some(column.into()),
            message: format!(
                "group `{g}` is in both `{}` ({}) and `{}` ({}); {} group(s) span two splits, \
                 and every row of a group must share one split",
                parts[j].name(),
                data.place(RowId(j as u64)),
                parts[i].name(),
                data.place(RowId(i as u64)),
                split_groups.len()
            ),
            lines: vec![],
            total: 0,
            unit: crate::error::RowUnit::Line,
        });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::audit::hash::row;

    fn data(n: usize) -> Dataset {
        Dataset::for_tests(
            ndarray::Array2::zeros((n, 1)),
            vec![false; n],
            BTreeMap::new(),
        )
    }

    #[test]
    fn shared_content_is_leakage() {
        let hashes = vec![
            row([1.0], false, 1),
            row([2.0], false, 1),
            row([1.0], false, 1),
        ];
        let lists = [vec![RowId(1)], vec![RowId(0)], vec![RowId(2)]];
        match check(&lists, &hashes, &data(3)) {
            Err(Error::Leakage {
                splits,
                overlapping,
                first,
            }) => {
                assert_eq!(splits, ("validation".into(), "test".into()));
                assert_eq!(overlapping, 1);
                assert_eq!(first, ("test.csv line 2".into(), "test.csv line 4".into()));
            }
            other => panic!("expected leakage, got {other:?}"),
        }
    }

    #[test]
    fn the_one_pass_check_agrees_with_the_general_one() {
        // Seeded random contents (few distinct values, so many collide) and
        // parts: both checks give the same verdict, count and first rows.
        use rand_chacha::rand_core::{Rng, SeedableRng};
        for seed in 0..200u64 {
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
            let n = 2 + (rng.next_u64() % 40) as usize;
            let hashes: Vec<ContentHash> = (0..n)
                .map(|_| row([(rng.next_u64() % 12) as f64], false, 1))
                .collect();
            let part_of: Vec<Part> = (0..n)
                .map(|_| Part::ALL[(rng.next_u64() % 3) as usize])
                .collect();
            let order = crate::audit::hash::order(&hashes);
            let mut lists: [Vec<RowId>; 3] = Default::default();
            for &i in &order.rows {
                lists[part_of[i as usize] as usize].push(RowId(u64::from(i)));
            }
            let d = data(n);
            let a = format!("{:?}", check(&lists, &hashes, &d));
            let b = format!("{:?}", check_sorted(&order, &part_of, &d));
            assert_eq!(a, b, "seed {seed}");
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
        assert!(check(&lists, &hashes, &data(3)).is_ok());
    }

    #[test]
    fn a_group_in_two_splits_is_refused() {
        let groups: crate::data::TextColumn = ["a", "b", "a"].iter().collect();
        let parts = [Part::Train, Part::Train, Part::Test];
        let e = check_groups(&parts, &groups, "die", &data(3))
            .unwrap_err()
            .to_string();
        assert!(
            e.contains(
                "group `a` is in both `train` (test.csv line 2) and `test` (test.csv line 4)"
            ),
            "{e}"
        );
    }
}
