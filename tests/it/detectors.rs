//! All detectors, threshold policies and the selection metric end to end.

use crate::util::{csv, rows, spec, Case, PROTOCOL};

fn case_with(detectors: &str, threshold: &str, extra: &str) -> Case {
    let yaml = spec(&["a", "b", "c"], PROTOCOL).replace(
        "detectors: [independent-gaussian, multivariate-gaussian]\nthreshold: max-f1\n",
        &format!("detectors: {detectors}\nthreshold: {threshold}\n{extra}"),
    );
    Case::new()
        .file("data.csv", csv(&["a", "b", "c"], &rows(600, 20, 51)))
        .file("spec.yaml", yaml)
        .keys()
}

#[test]
fn every_detector_runs_and_records_its_parameters() {
    let d = case_with(
        "\n  - independent-gaussian\n  - multivariate-gaussian\n  - robust-gaussian\n  - gaussian-mixture: {k-min: 1, k-max: 3}\n  - knn-distance: {k: 7}",
        "max-f1",
        "",
    )
    .run_spec()
    .success();
    let run = d.json("out/run.json");
    let c = run["candidates"].as_array().unwrap();
    let tags: Vec<&str> = c
        .iter()
        .map(|c| c["params"]["detector"].as_str().unwrap())
        .collect();
    assert_eq!(
        tags,
        [
            "independent-gaussian",
            "multivariate-gaussian",
            "robust-gaussian",
            "gaussian-mixture",
            "knn-distance"
        ]
    );
    assert_eq!(c[2]["params"]["support"], 182); // ⌊(360 + 3 + 1)/2⌋
    assert!(c[3]["params"]["k"].as_u64().unwrap() >= 1);
    assert_eq!(c[3]["params"]["bic-by-k"].as_array().unwrap().len(), 3);
    assert_eq!(c[4]["params"]["k"], 7);
    assert_eq!(c[4]["parameter-count"], 360 * 3);
    let header = d.read("out/scores.csv").lines().next().unwrap().to_string();
    assert!(
        header.ends_with("robust-gaussian,gaussian-mixture,knn-distance"),
        "{header}"
    );
    for cand in c {
        let m = &cand["test"];
        assert!(m["roc-auc"].as_f64().unwrap() > 0.8, "{}", cand["name"]);
        assert!(
            m["bootstrap-95"]["roc-auc"]["low"].as_f64().unwrap() <= m["roc-auc"].as_f64().unwrap()
        );
        assert!(
            m["precision-95"]["clopper-pearson"]["high"]
                .as_f64()
                .unwrap()
                <= 1.0
        );
    }
}

#[test]
fn alarm_budget_and_recall_target_hold_on_validation() {
    for (policy, check) in [
        ("{alarm-budget: {max-false-positive-rate: 0.01}}", "fpr"),
        ("{recall-target: {min-recall: 0.9}}", "recall"),
    ] {
        let d = case_with("[multivariate-gaussian]", policy, "")
            .run_spec()
            .success();
        let v = &d.json("out/run.json")["candidates"][0]["validation"];
        match check {
            "fpr" => assert!(v["false-positive-rate"].as_f64().unwrap() <= 0.01),
            _ => assert!(v["recall"].as_f64().unwrap() >= 0.9),
        }
    }
}

#[test]
fn min_cost_and_fixed_thresholds() {
    let d = case_with("[multivariate-gaussian]", "{fixed: {ln-epsilon: -9.5}}", "")
        .run_spec()
        .success();
    let c = &d.json("out/run.json")["candidates"][0];
    assert_eq!(c["tau"], 9.5);
    assert_eq!(c["ln-epsilon"], -9.5);
    let d = case_with(
        "[multivariate-gaussian]",
        "{min-cost: {missed-anomaly: 100, false-alarm: 1}}",
        "",
    )
    .run_spec()
    .success();
    let v = &d.json("out/run.json")["candidates"][0]["validation"]["confusion"];
    // Missing an anomaly costs 100 false alarms, so recall is favoured.
    assert!(v["fn"].as_u64().unwrap() <= 2, "{v}");
}

#[test]
fn an_unmet_policy_is_refused_with_the_closest_point() {
    // A precision above every achievable one: identical scores for everything
    // cannot be made precise.
    let yaml = spec(&["a"], PROTOCOL).replace(
        "threshold: max-f1",
        "threshold: {precision-target: {min-precision: 1.0}}",
    );
    let r: crate::util::Rows = rows(300, 20, 52)
        .into_iter()
        .map(|(id, x, a)| (id, vec![x[2], x[1], x[0]], a))
        .collect();
    Case::new()
        .file("data.csv", csv(&["a", "b", "c"], &r))
        .file("spec.yaml", yaml)
        .keys()
        .run_spec()
        .fails(
            3,
            &[
                "no candidate meets the threshold policy",
                "precision ≥ 1 cannot be met",
                "closest point is precision",
            ],
        );
}

#[test]
fn the_declared_selection_metric_ranks_on_validation() {
    let d = case_with(
        "[independent-gaussian, multivariate-gaussian, knn-distance]",
        "max-f1",
        "selection: {metric: roc-auc}\n",
    )
    .run_spec()
    .success();
    let run = d.json("out/run.json");
    assert_eq!(run["selection"]["metric"], "roc-auc");
    let c = run["candidates"].as_array().unwrap();
    // Highest validation AUC; among equals the fewest parameters, then spec order.
    let mut best = &c[0];
    for cand in &c[1..] {
        let (x, y) = (
            cand["validation"]["roc-auc"].as_f64().unwrap(),
            best["validation"]["roc-auc"].as_f64().unwrap(),
        );
        let fewer = cand["parameter-count"].as_u64() < best["parameter-count"].as_u64();
        if x > y || (x == y && fewer) {
            best = cand;
        }
    }
    assert_eq!(run["selection"]["chosen"], best["name"]);
}

#[test]
fn a_detector_setting_out_of_range_is_a_spec_error() {
    case_with("[{gaussian-mixture: {k-min: 4, k-max: 2}}]", "max-f1", "")
        .run_spec()
        .fails(2, &["field `detectors[0].gaussian-mixture`", "k-min"]);
    case_with("[robust-gausian]", "max-f1", "")
        .run_spec()
        .fails(
            2,
            &[
                "unknown variant `robust-gausian`",
                "did you mean `robust-gaussian`?",
            ],
        );
}
