//! The protocol split: exact counts, independence from row order, identical
//! rows kept together.

use std::collections::BTreeMap;

use crate::util::{csv, rows, standard, Rows};

/// 10,000 normal and 20 anomalous rows split 60/20/20 and 0/50/50 give exactly
/// 6,000/2,000/2,000 normal and 0/10/10 anomalous rows (common practice, no
/// source: the protocol's own arithmetic).
#[test]
fn protocol_split_counts_are_exact() {
    let case = standard(&rows(10_000, 20, 1)).run_spec();
    let done = case.success();
    let run = done.json("out/run.json");
    let counts = &run["split"]["counts"];
    assert_eq!(counts["train"]["normal"], 6000);
    assert_eq!(counts["train"]["anomaly"], 0);
    assert_eq!(counts["validation"]["normal"], 2000);
    assert_eq!(counts["validation"]["anomaly"], 10);
    assert_eq!(counts["test"]["normal"], 2000);
    assert_eq!(counts["test"]["anomaly"], 10);
    assert_eq!(run["split"]["rows-off-requested-counts"], 0);
    // scores.csv has one line per validation and test row, plus the header.
    assert_eq!(done.read("out/scores.csv").lines().count(), 1 + 4020);
}

fn splits_of(done: &crate::util::Done) -> BTreeMap<String, String> {
    done.read("out/scores.csv")
        .lines()
        .skip(1)
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            (f[0].to_string(), f[1].to_string())
        })
        .collect()
}

#[test]
fn reordering_the_file_changes_no_split_and_no_number() {
    let r = rows(600, 12, 2);
    let mut reversed: Rows = r.clone();
    reversed.reverse();
    let a = standard(&r).run_spec().success();
    let b = standard(&reversed).run_spec().success();
    let (ja, jb) = (a.json("out/run.json"), b.json("out/run.json"));
    assert_eq!(ja["split"], jb["split"]);
    assert_eq!(
        ja["candidates"], jb["candidates"],
        "parameters, τ and metrics"
    );
    assert_eq!(splits_of(&a), splits_of(&b));
}

#[test]
fn identical_rows_share_one_split() {
    // 300 distinct normal rows, each of the first 100 written 5 times, and 10
    // anomalies each written twice.
    let base = rows(300, 10, 3);
    let mut r: Rows = Vec::new();
    for (i, (_, x, a)) in base.iter().enumerate() {
        let copies = if *a {
            2
        } else if i < 100 {
            5
        } else {
            1
        };
        for k in 0..copies {
            r.push((format!("g{i}c{k}"), x.clone(), *a));
        }
    }
    let case = crate::util::Case::new()
        .file("data.csv", csv(&["a", "b", "c"], &r))
        .file(
            "spec.yaml",
            crate::util::spec(&["a", "b", "c"], crate::util::PROTOCOL),
        )
        .keys()
        .run_spec();
    let done = case.success();
    let placed = splits_of(&done);
    // Group every id by its source group; all copies must sit in one split
    // (train rows are absent from scores.csv, so "absent" counts as train).
    let mut by_group: BTreeMap<String, Vec<String>> = BTreeMap::new();
    for (id, _, _) in &r {
        let g = id.split('c').next().unwrap().to_string();
        by_group
            .entry(g)
            .or_default()
            .push(placed.get(id).cloned().unwrap_or_else(|| "train".into()));
    }
    for (g, parts) in by_group {
        assert!(
            parts.windows(2).all(|w| w[0] == w[1]),
            "group {g} split across {parts:?}"
        );
    }
    let run = done.json("out/run.json");
    assert_eq!(run["split"]["rows-with-duplicates"], 100 * 5 + 10 * 2);
    // The run reports the counts it obtained; they add up to every row.
    let c = &run["split"]["counts"];
    let total: u64 = ["train", "validation", "test"]
        .iter()
        .map(|p| c[p]["normal"].as_u64().unwrap() + c[p]["anomaly"].as_u64().unwrap())
        .sum();
    assert_eq!(total, r.len() as u64);
    assert_eq!(c["validation"]["anomaly"].as_u64().unwrap() % 2, 0);
}

#[test]
fn another_seed_gives_another_split() {
    let r = rows(500, 10, 4);
    let a = standard(&r).run_spec().success();
    let case = standard(&r).file(
        "spec.yaml",
        crate::util::spec(&["a", "b", "c"], "  protocol:\n    seed: 8"),
    );
    let b = case.run_spec().success();
    assert_ne!(
        a.json("out/run.json")["split"]["manifest-blake3"],
        b.json("out/run.json")["split"]["manifest-blake3"]
    );
}
