//! The command line end to end: what a run writes and prints.

use crate::util::{csv, rows, spec, standard, Case, PROTOCOL, RUN};

#[test]
fn run_writes_the_signed_directory_and_a_summary() {
    let d = standard(&rows(1000, 20, 12)).run_spec().success();
    assert!(
        d.stdout
            .starts_with("chosen: multivariate-gaussian (validation F1 "),
        "{}",
        d.stdout
    );
    let mut files = anomark::sign::list_files(&d.dir.join("out")).unwrap();
    files.sort();
    files.retain(|f| !f.starts_with("plot-")); // the figures: tests/it/card.rs
    assert_eq!(
        files,
        [
            "card.html",
            "card.md",
            "manifest.json",
            "manifest.sig",
            "run.json",
            "scores.csv",
            "spec.yaml"
        ]
    );
    let run = d.json("out/run.json");
    assert_eq!(run["format"], 1);
    assert_eq!(
        run["tool"],
        format!("anomark {}", env!("CARGO_PKG_VERSION"))
    );
    assert_eq!(run["selection"]["chosen"], "multivariate-gaussian");
    assert_eq!(run["inputs"][0]["path"], "data.csv");
    let data = std::fs::read(d.dir.join("data.csv")).unwrap();
    assert_eq!(
        run["inputs"][0]["blake3"],
        blake3::hash(&data).to_hex().as_str()
    );
    let spec_bytes = std::fs::read(d.dir.join("spec.yaml")).unwrap();
    assert_eq!(
        run["spec"]["blake3"],
        blake3::hash(&spec_bytes).to_hex().as_str()
    );
    for c in run["candidates"].as_array().unwrap() {
        let tau = c["tau"].as_f64().unwrap();
        assert_eq!(c["ln-epsilon"].as_f64().unwrap(), -tau);
        let v = &c["validation"]["confusion"];
        let n: u64 = ["tp", "fp", "fn", "tn"]
            .iter()
            .map(|k| v[k].as_u64().unwrap())
            .sum();
        assert_eq!(n, 210);
    }
    // scores.csv: id, split, 0/1 label, one score column per candidate; the
    // recorded τ reproduces the recorded validation confusion matrix.
    let scores = d.read("out/scores.csv");
    let mut lines = scores.lines();
    assert_eq!(
        lines.next().unwrap(),
        "id,split,label,independent-gaussian,multivariate-gaussian"
    );
    let tau = run["candidates"][1]["tau"].as_f64().unwrap();
    let (mut tp, mut fp) = (0, 0);
    for l in lines {
        let f: Vec<&str> = l.split(',').collect();
        assert!(f[2] == "0" || f[2] == "1");
        if f[1] == "validation" && f[4].parse::<f64>().unwrap() > tau {
            if f[2] == "1" {
                tp += 1
            } else {
                fp += 1
            }
        }
    }
    assert_eq!(tp, run["candidates"][1]["validation"]["confusion"]["tp"]);
    assert_eq!(fp, run["candidates"][1]["validation"]["confusion"]["fp"]);
    // The card names the chosen detector, marks the others' test numbers and warns about accuracy.
    let card = d.read("out/card.md");
    assert!(card.contains("**multivariate-gaussian**"), "{card}");
    assert!(card.contains("not used for selection"));
    assert!(card.contains("accuracy misleads"));
}

#[test]
fn strings_from_the_data_are_escaped_in_the_card() {
    let r = rows(200, 10, 13);
    let evil = "<script>alert(1)</script>";
    let d = Case::new()
        .file("data.csv", csv(&["a", "b", evil], &r))
        .file("spec.yaml", spec(&["a", "b", evil], PROTOCOL))
        .keys()
        .run_spec()
        .success();
    let html = d.read("out/card.html");
    assert!(!html.contains(evil), "raw script tag in card.html");
    assert!(
        html.contains("&lt;script&gt;alert(1)&lt;&#x2f;script&gt;"),
        "escaped form missing"
    );
    assert!(!d.read("out/card.md").contains("<script>"));
}

#[test]
fn templates_directory_replaces_a_built_in_template() {
    let case = standard(&rows(200, 10, 14)).file("tpl/card.md", "# {{ title }} by {{ owner }}\n");
    let d = case
        .args(RUN.into_iter().chain(["--templates", "tpl"]))
        .success();
    assert_eq!(d.read("out/card.md"), "# Test card by Tests\n");
    assert!(d.read("out/card.html").contains("<h1>Test card</h1>"));
}

#[test]
fn broken_template_names_template_and_line() {
    let case = standard(&rows(200, 10, 14)).file("tpl/card.md", "line one\n{{ no_such_field }}\n");
    case.args([
        "run",
        "spec.yaml",
        "--key",
        "key.pem",
        "--out",
        "out",
        "--templates",
        "tpl",
    ])
    .fails(4, &["template `card.md` line 2"]);
}

#[test]
fn schema_prints_json() {
    let d = Case::new().args(["schema"]).success();
    let v: serde_json::Value = serde_json::from_str(&d.stdout).unwrap();
    assert!(v["properties"]["split"].is_object());
}

#[test]
fn usage_error_exits_with_two() {
    let d = Case::new().args(["run"]).exec();
    assert_eq!(d.code, 2);
}
