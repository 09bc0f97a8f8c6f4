//! `anomark diff`: two releases compared by hash and by paired statistics.

use crate::util::{rows, spec, standard, PROTOCOL};

#[test]
fn two_releases_on_the_same_test_rows_are_paired() {
    let case = standard(&rows(500, 20, 81));
    case.clone().run_spec().success();
    let newer = spec(&["a", "b", "c"], PROTOCOL).replace(
        "detectors: [independent-gaussian, multivariate-gaussian]",
        "detectors: [independent-gaussian]",
    );
    case.clone()
        .file("spec.yaml", newer)
        .args([
            "run",
            "spec.yaml",
            "--key",
            "key.pem",
            "--out",
            "new",
            "--open-test",
            "--no-wall-clock",
        ])
        .success();
    let d = case
        .clone()
        .args(["diff", "out", "new", "--json"])
        .success();
    let v: serde_json::Value = serde_json::from_str(&d.stdout).unwrap();
    assert_eq!(
        v["chosen"],
        serde_json::json!(["multivariate-gaussian", "independent-gaussian"])
    );
    assert_eq!(v["spec-fields"], serde_json::json!(["detectors"]));
    assert!(v["inputs"].as_object().unwrap().is_empty());
    assert!(
        v["splits"].as_object().unwrap().is_empty(),
        "same seed and data: same rows"
    );
    assert_eq!(
        v["only-in"][0],
        serde_json::json!(["multivariate-gaussian"])
    );
    let p = &v["paired"];
    assert_eq!(p["rows"], 110);
    let (b, c) = (
        p["old-right-new-wrong"].as_u64().unwrap(),
        p["old-wrong-new-right"].as_u64().unwrap(),
    );
    let want = anomark::diff::mcnemar_exact(b, c);
    assert_eq!(p["mcnemar-exact-p"].as_f64().unwrap(), want);
    let ci = &p["f1-difference-95"];
    assert!(ci["low"].as_f64().unwrap() <= ci["high"].as_f64().unwrap());
    let text = case.clone().args(["diff", "out", "new"]).success().stdout;
    assert!(
        text.contains("paired test comparison over 110 rows"),
        "{text}"
    );
    assert!(text.contains("spec fields changed: detectors"), "{text}");
}

#[test]
fn different_test_rows_are_not_paired() {
    let case = standard(&rows(400, 12, 82));
    case.clone().run_spec().success();
    case.clone()
        .file(
            "spec.yaml",
            spec(&["a", "b", "c"], "  protocol:\n    seed: 99"),
        )
        .args([
            "run",
            "spec.yaml",
            "--key",
            "key.pem",
            "--out",
            "new",
            "--open-test",
        ])
        .success();
    let text = case.clone().args(["diff", "out", "new"]).success().stdout;
    assert!(text.contains("split test: rows changed"), "{text}");
    // Both runs read the same data, so every row is in both: rows only move.
    let v: serde_json::Value = serde_json::from_str(
        &case
            .clone()
            .args(["diff", "out", "new", "--json"])
            .success()
            .stdout,
    )
    .unwrap();
    let moves = v["rows"].as_object().unwrap();
    assert!(!moves.is_empty());
    assert!(moves.keys().all(|k| !k.contains("absent")), "{moves:?}");
    let moved: u64 = moves.values().map(|n| n.as_u64().unwrap()).sum();
    assert!(moved > 0 && moved < 412);
    assert!(
        text.contains("rows train -> test:") || text.contains("rows validation -> test:"),
        "{text}"
    );
    assert!(
        text.contains(
            "paired test comparison: none (the runs were evaluated on different test rows)"
        ),
        "{text}"
    );
}
