//! A fixed split column: accepted when the splits are disjoint by content,
//! refused (naming the rows) when they are not.

use crate::util::{csv, rows, spec, Case};

fn with_split_column(r: &crate::util::Rows, parts: &[&str]) -> String {
    let body = csv(&["a", "b", "c"], r);
    let mut out = String::new();
    for (i, line) in body.lines().enumerate() {
        out.push_str(line);
        out.push(',');
        out.push_str(if i == 0 {
            "split"
        } else {
            parts[(i - 1) % parts.len()]
        });
        out.push('\n');
    }
    out
}

fn parts_for(r: &[(String, Vec<f64>, bool)]) -> Vec<&'static str> {
    r.iter()
        .enumerate()
        .map(|(i, (_, _, a))| match (a, i % 5) {
            (true, k) if k % 2 == 0 => "validation",
            (true, _) => "test",
            (false, 0) => "validation",
            (false, 1) => "test",
            _ => "train",
        })
        .collect()
}

const FROM_COLUMN: &str = "  from-column: split";

#[test]
fn disjoint_fixed_split_is_accepted() {
    let r = rows(200, 10, 5);
    let parts = parts_for(&r);
    let done = Case::new()
        .file("data.csv", with_split_column(&r, &parts))
        .file("spec.yaml", spec(&["a", "b", "c"], FROM_COLUMN))
        .keys()
        .run_spec()
        .success();
    let run = done.json("out/run.json");
    assert_eq!(run["split"]["method"], "from-column");
    assert_eq!(run["split"]["counts"]["train"]["normal"], 120);
}

#[test]
fn shared_content_across_fixed_splits_is_refused() {
    let mut r = rows(200, 10, 6);
    // Row 2 (validation... see parts_for: index 2 → train) duplicated at the end
    // as a validation row: same content in train and validation.
    let dup = r[2].clone();
    r.push(("dup".into(), dup.1, dup.2));
    let mut parts = parts_for(&r[..r.len() - 1]);
    parts.push("validation");
    Case::new()
        .file("data.csv", with_split_column(&r, &parts))
        .file("spec.yaml", spec(&["a", "b", "c"], FROM_COLUMN))
        .keys()
        .run_spec()
        .fails(
            3,
            &[
                "leakage",
                "`train`",
                "`validation`",
                "line 4",
                &format!("line {}", r.len() + 1),
            ],
        );
}

#[test]
fn unknown_split_value_is_refused() {
    let r = rows(50, 4, 7);
    let mut parts = parts_for(&r);
    parts[3] = "holdout";
    Case::new()
        .file("data.csv", with_split_column(&r, &parts))
        .file("spec.yaml", spec(&["a", "b", "c"], FROM_COLUMN))
        .keys()
        .run_spec()
        .fails(3, &["column `split`", "`holdout`", "line 5"]);
}

#[test]
fn known_anomaly_in_train_is_refused() {
    let r = rows(50, 4, 8);
    let mut parts = parts_for(&r);
    parts[51] = "train";
    Case::new()
        .file("data.csv", with_split_column(&r, &parts))
        .file("spec.yaml", spec(&["a", "b", "c"], FROM_COLUMN))
        .keys()
        .run_spec()
        .fails(3, &["known anomaly", "`train`", "line 53"]);
}

#[test]
fn a_group_in_two_fixed_splits_is_refused() {
    let r = rows(200, 10, 9);
    let parts = parts_for(&r);
    // Group = row index / 7: groups straddle the parts that parts_for cycles through.
    let body = with_split_column(&r, &parts);
    let mut out = String::new();
    for (i, line) in body.lines().enumerate() {
        out.push_str(line);
        out.push(',');
        if i == 0 {
            out.push_str("die");
        } else {
            out.push_str(&format!("d{}", (i - 1) / 7));
        }
        out.push('\n');
    }
    Case::new()
        .file("data.csv", out)
        .file(
            "spec.yaml",
            spec(
                &["a", "b", "c"],
                "  from-column: {column: split, group-column: die}",
            ),
        )
        .keys()
        .run_spec()
        .fails(
            3,
            &[
                "column `die`",
                "group `d0` is in both `validation` (data.csv line 2) and `test` (data.csv line 3)",
            ],
        );
}
