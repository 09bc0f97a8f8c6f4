//! Derived features, transforms fitted on train, and feature sets compared as
//! candidates on validation.

use crate::util::{csv, rows, Case, Rows, PROTOCOL};

fn positive(r: &Rows) -> Rows {
    r.iter()
        .map(|(id, x, a)| (id.clone(), vec![x[0] + 10.0, x[1] + 10.0, (x[2]).exp()], *a))
        .collect()
}

fn spec_with(features: &str) -> String {
    crate::util::spec(&["a"], PROTOCOL).replace("  features:\n    - \"a\"\n", features)
}

#[test]
fn feature_sets_times_detectors_are_the_candidates() {
    let r = positive(&rows(800, 16, 41));
    let features = "  feature-sets:\n    - name: plain\n      features: [a, b]\n    - name: more\n      features:\n        - a\n        - b\n        - {column: c, transform: [box-cox, standardise]}\n        - {ratio: [a, b], name: a-over-b}\n";
    let d = Case::new()
        .file("data.csv", csv(&["a", "b", "c"], &r))
        .file("spec.yaml", spec_with(features))
        .keys()
        .run_spec()
        .success();
    let run = d.json("out/run.json");
    let names: Vec<&str> = run["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .map(|c| c["name"].as_str().unwrap())
        .collect();
    assert_eq!(
        names,
        [
            "plain/independent-gaussian",
            "plain/multivariate-gaussian",
            "more/independent-gaussian",
            "more/multivariate-gaussian"
        ]
    );
    // Every candidate's test numbers exist; only one is chosen.
    assert_eq!(
        run["candidates"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|c| c["chosen"] == true)
            .count(),
        1
    );
    let more = &run["feature-sets"][1]["features"];
    assert_eq!(more[2]["name"], "standardise(box-cox(c))");
    assert_eq!(more[2]["transforms"][0]["transform"], "box-cox");
    let lambda = more[2]["transforms"][0]["lambda"].as_f64().unwrap();
    // c = exp(z) is log-normal, so the Box-Cox λ should be near 0.
    assert!(lambda.abs() < 0.2, "λ = {lambda}");
    assert_eq!(more[2]["transforms"][1]["transform"], "standardise");
    assert_eq!(more[3]["from"], "ratio of a and b");
    assert_eq!(run["content-columns"], serde_json::json!(["a", "b", "c"]));
    let header = d.read("out/scores.csv").lines().next().unwrap().to_string();
    assert_eq!(header, "id,split,label,plain/independent-gaussian,plain/multivariate-gaussian,more/independent-gaussian,more/multivariate-gaussian");
    let card = d.read("out/card.md");
    assert!(
        card.contains("**more**") && card.contains("Box\\-Cox") || card.contains("Box-Cox"),
        "{card}"
    );
}

#[test]
fn a_value_outside_a_transform_domain_names_the_rows() {
    let mut r = positive(&rows(200, 10, 42));
    r[7].1[2] = -1.0;
    let features = "  features:\n    - a\n    - {column: c, transform: log}\n";
    Case::new()
        .file("data.csv", csv(&["a", "b", "c"], &r))
        .file("spec.yaml", spec_with(features))
        .keys()
        .run_spec()
        .fails(
            3,
            &["column `log(c)`", "`log` cannot take this value", "line 9"],
        );
}

#[test]
fn transforms_are_fitted_on_train_only() {
    // The standardise mean recorded is the mean of the training rows, which
    // the scores file lets us rebuild: train rows are exactly those absent
    // from scores.csv.
    let r = positive(&rows(300, 10, 43));
    let features = "  features:\n    - {column: a, transform: standardise}\n";
    let d = Case::new()
        .file("data.csv", csv(&["a", "b", "c"], &r))
        .file("spec.yaml", spec_with(features))
        .keys()
        .run_spec()
        .success();
    let run = d.json("out/run.json");
    let listed: std::collections::BTreeSet<String> = d
        .read("out/scores.csv")
        .lines()
        .skip(1)
        .map(|l| l.split(',').next().unwrap().to_string())
        .collect();
    let train: Vec<f64> = r
        .iter()
        .filter(|x| !listed.contains(&x.0))
        .map(|x| x.1[0])
        .collect();
    assert_eq!(train.len(), 180);
    let mean = train.iter().sum::<f64>() / train.len() as f64;
    let got = run["feature-sets"][0]["features"][0]["transforms"][0]["mean"]
        .as_f64()
        .unwrap();
    assert!((got - mean).abs() < 1e-9, "{got} vs {mean}");
}

/// A detector's refusal on a named feature set is wrapped with the set's
/// name (context added by wrapping, the inner message unchanged) and keeps
/// the inner error's exit code.
#[test]
fn a_fit_refused_on_a_named_feature_set_names_the_set() {
    // c = 2a exactly: the set `twins` is collinear, so the multivariate
    // Gaussian refuses its covariance.
    let r: Rows = positive(&rows(400, 8, 43))
        .into_iter()
        .map(|(id, x, a)| (id, vec![x[0], x[1], 2.0 * x[0]], a))
        .collect();
    let features = "  feature-sets:\n    - name: plain\n      features: [a, b]\n    - name: twins\n      features: [a, c]\n";
    Case::new()
        .file("data.csv", csv(&["a", "b", "c"], &r))
        .file("spec.yaml", spec_with(features))
        .keys()
        .run_spec()
        .fails(
            3,
            &["feature set `twins`: detector `multivariate-gaussian`: "],
        );
}
