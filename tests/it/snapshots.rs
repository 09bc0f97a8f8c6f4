//! Tests that pin behaviour while the code moves: a scripted detector with
//! fixed scores makes an end-to-end run exactly known, and snapshots hold the
//! whole card.md of a small fixed run and the error output of a few refusals.
//!
//! The scripted detector is an external command (Python's standard library
//! only) whose score for a row is the row's feature `s`: the scores are
//! written in the data file, so every number of the run can be worked out by
//! hand. Without a `python3` these tests print a skip; when `CI` is set they
//! fail instead.
//!
//! Snapshots live in `tests/snapshots/`. With `ANOMARK_UPDATE_SNAPSHOTS=1`
//! the tests rewrite them instead of comparing (see DEVELOPERS.md).

use std::path::Path;

use crate::command::python;
use crate::util::{Case, Done};

/// The scripted detector: reads `rows.csv` from the exchange folder (the
/// last argument) and writes feature `s` of each row as its score.
const SCRIPTED: &str = r#""""Scripted detector for tests: the score of each row is its feature `s`."""
import os
import sys

d = sys.argv[-1]
with open(os.path.join(d, "rows.csv")) as f:
    lines = f.read().splitlines()
col = lines[0].split(",").index("s")
with open(os.path.join(d, "scores.csv"), "w") as f:
    f.write("score\n")
    for line in lines[1:]:
        f.write(line.split(",")[col] + "\n")
"#;

/// Rows with their split fixed by a column, so that nothing of the run
/// depends on a sampler. Scores (feature `s`):
/// validation normals 1–6, anomalies 5.5, 7, 8;
/// test normals 1.25, 2.25, 3.25, 4.25, 6.5, anomalies 5, 7.5, 9.
/// Every content is distinct (identical contents in two splits are refused).
const DATA: &str = "id,s,label,split
t0,0.5,normal,train
t1,1.5,normal,train
t2,2.5,normal,train
t3,3.5,normal,train
t4,4.5,normal,train
vn0,1,normal,validation
vn1,2,normal,validation
vn2,3,normal,validation
vn3,4,normal,validation
vn4,5,normal,validation
vn5,6,normal,validation
va0,5.5,anomaly,validation
va1,7,anomaly,validation
va2,8,anomaly,validation
sn0,1.25,normal,test
sn1,2.25,normal,test
sn2,3.25,normal,test
sn3,4.25,normal,test
sn4,6.5,normal,test
sa0,5,anomaly,test
sa1,7.5,anomaly,test
sa2,9,anomaly,test
";

/// The bootstrap is off so that nothing here depends on its sampler.
const SPEC: &str = "format: 1
data:
  path: data.csv
  id-column: id
  label:
    column: label
    normal: normal
    anomaly: anomaly
  features:
    - s
split:
  from-column: split
detectors:
  - command:
      name: scripted
      run: [python3, scripted.py]
      inputs: [scripted.py]
threshold: max-f1
bootstrap: {replicates: 0}
card:
  title: Scripted card
  owner: Tests
  intended-use: Testing
";

fn scripted_case() -> Case {
    Case::new()
        .file("data.csv", DATA)
        .file("scripted.py", SCRIPTED)
        .file("spec.yaml", SPEC)
        .keys()
}

/// z for a two-sided 95 % interval, Φ⁻¹(0.975) (any normal table; the
/// digits as scipy.stats.norm.ppf(0.975) prints them).
const Z: f64 = 1.959_963_984_540_054;

/// The Wilson score interval (Wilson 1927, "Probable inference, the law of
/// succession, and statistical inference", JASA 22: 209–212).
fn wilson(k: f64, n: f64) -> (f64, f64) {
    let p = k / n;
    let z2 = Z * Z;
    let centre = (p + z2 / (2.0 * n)) / (1.0 + z2 / n);
    let half = Z / (1.0 + z2 / n) * (p * (1.0 - p) / n + z2 / (4.0 * n * n)).sqrt();
    (centre - half, centre + half)
}

fn close(got: &serde_json::Value, want: f64, what: &str) {
    let g = got.as_f64().unwrap_or_else(|| panic!("{what}: {got}"));
    assert!((g - want).abs() <= 1e-12, "{what}: {g} vs {want}");
}

#[test]
fn a_scripted_run_gives_the_hand_computed_numbers() {
    if python(&[]).is_none() {
        return;
    }
    let d = scripted_case().run_spec().success();
    let run = d.json("out/run.json");
    let c = &run["candidates"][0];
    assert_eq!(c["name"], "scripted");
    assert_eq!(c["chosen"], true);

    // τ by hand. Validation, highest score first: 8 A, 7 A, 6 N, 5.5 A, 5 N,
    // 4 N, ... Flagging the top k gives F1 = 2TP / (2TP + FP + FN):
    // k = 1: 2/4; k = 2: 4/5; k = 3: 4/6; k = 4: 6/7; k = 5: 6/8; beyond,
    // lower. The best is k = 4 and τ is the midpoint between the lowest
    // flagged score (5.5) and the next lower one (5): 5.25 (README,
    // "Threshold policies").
    assert_eq!(c["tau"].as_f64(), Some(5.25));
    let v = &c["validation"];
    assert_eq!(
        v["confusion"],
        serde_json::json!({"tp": 3, "fp": 1, "fn": 0, "tn": 5})
    );
    close(&v["precision"], 3.0 / 4.0, "validation precision");
    close(&v["recall"], 1.0, "validation recall");
    close(&v["f1"], 6.0 / 7.0, "validation F1");
    // ROC AUC as the Mann-Whitney statistic (scikit-learn's roc_auc_score
    // gives the same): anomaly 8 and 7 beat all 6 normals, 5.5 beats 5 of
    // them: 17 of 18 pairs. Computed by hand.
    close(&v["roc-auc"], 17.0 / 18.0, "validation ROC AUC");
    // Average precision, Σ (Rₙ − Rₙ₋₁) Pₙ (scikit-learn's
    // average_precision_score): anomalies at ranks 1, 2 and 4, so
    // (1 + 1 + 3/4) / 3 = 11/12. Computed by hand.
    close(&v["average-precision"], 11.0 / 12.0, "validation AP");

    // Test, flagged when s > 5.25: 9 A, 7.5 A, 6.5 N; 5 A is missed; the
    // normals 1.25–4.25 are not flagged.
    let t = &c["test"];
    assert_eq!(
        t["confusion"],
        serde_json::json!({"tp": 2, "fp": 1, "fn": 1, "tn": 4})
    );
    close(&t["precision"], 2.0 / 3.0, "test precision");
    close(&t["recall"], 2.0 / 3.0, "test recall");
    close(&t["f1"], 2.0 / 3.0, "test F1");
    close(&t["specificity"], 4.0 / 5.0, "test specificity");
    close(&t["false-positive-rate"], 1.0 / 5.0, "test FPR");
    close(&t["balanced-accuracy"], (2.0 / 3.0 + 4.0 / 5.0) / 2.0, "BA");
    // Matthews: (TP·TN − FP·FN) / √((TP+FP)(TP+FN)(TN+FP)(TN+FN))
    // = (8 − 1) / √(3·3·5·5) = 7/15. Computed by hand.
    close(&t["mcc"], 7.0 / 15.0, "test MCC");
    close(&t["accuracy"], 6.0 / 8.0, "test accuracy");
    // Mann-Whitney: 9 and 7.5 beat all 5 normals, 5 beats 4: 14 of 15.
    close(&t["roc-auc"], 14.0 / 15.0, "test ROC AUC");
    // Anomalies at ranks 1, 2 and 4: (1 + 1 + 3/4) / 3 = 11/12.
    close(&t["average-precision"], 11.0 / 12.0, "test AP");
    // Wilson intervals from the formula; the printed digits agree with
    // statsmodels' proportion_confint(2, 3, method="wilson") =
    // (0.2076596008020477, 0.9385080552796037) and (1, 5) =
    // (0.036224108632430196, 0.6244653702374748).
    for (key, k, n) in [
        ("precision-95", 2.0, 3.0),
        ("recall-95", 2.0, 3.0),
        ("false-positive-rate-95", 1.0, 5.0),
    ] {
        let (lo, hi) = wilson(k, n);
        close(&t[key]["wilson"]["low"], lo, key);
        close(&t[key]["wilson"]["high"], hi, key);
    }
    close(
        &t["precision-95"]["wilson"]["low"],
        0.2076596008020477,
        "sm",
    );
    close(
        &t["precision-95"]["wilson"]["high"],
        0.9385080552796037,
        "sm",
    );
    // Clopper-Pearson, against statsmodels' proportion_confint(2, 3,
    // method="beta") = (0.09429932405024609, 0.9915962413403874).
    let cp = &t["precision-95"]["clopper-pearson"];
    assert!((cp["low"].as_f64().unwrap() - 0.09429932405024609).abs() <= 1e-12);
    assert!((cp["high"].as_f64().unwrap() - 0.9915962413403874).abs() <= 1e-12);
    // With no bootstrap replicates there is no bootstrap interval.
    assert!(t["bootstrap-95"]["f1"].is_null());

    // scores.csv: each validation and test row's score is its own `s`.
    let scores = d.read("out/scores.csv");
    let want: std::collections::BTreeMap<&str, &str> = DATA
        .lines()
        .skip(1)
        .filter(|l| !l.ends_with(",train"))
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            (f[0], f[1])
        })
        .collect();
    let mut seen = 0;
    for l in scores.lines().skip(1) {
        let f: Vec<&str> = l.split(',').collect();
        let s: f64 = f[3].parse().unwrap();
        let w: f64 = want[f[0]].parse().unwrap();
        assert_eq!(s, w, "{l}");
        seen += 1;
    }
    assert_eq!(seen, want.len());
}

/// Compares `got` with `tests/snapshots/NAME`, or rewrites the file when
/// `ANOMARK_UPDATE_SNAPSHOTS=1`.
fn snapshot(name: &str, got: &str) {
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/snapshots")
        .join(name);
    if std::env::var("ANOMARK_UPDATE_SNAPSHOTS").as_deref() == Ok("1") {
        std::fs::write(&path, got).unwrap();
        return;
    }
    let want = std::fs::read_to_string(&path).unwrap_or_else(|e| {
        panic!(
            "snapshot `{}`: {e}; run with ANOMARK_UPDATE_SNAPSHOTS=1 to write it",
            path.display()
        )
    });
    if want != got {
        let line = want
            .lines()
            .zip(got.lines())
            .position(|(a, b)| a != b)
            .unwrap_or(want.lines().count().min(got.lines().count()));
        panic!(
            "snapshot `{name}` differs from line {}:\n  want: {:?}\n  got:  {:?}\n\
             if the change is intended, run with ANOMARK_UPDATE_SNAPSHOTS=1 and review the diff",
            line + 1,
            want.lines().nth(line),
            got.lines().nth(line)
        );
    }
}

/// What depends on the build or the host goes: the version, the signing
/// key's fingerprint (a fresh key per test) and the case's directory.
fn redact(text: &str, d: &Done) -> String {
    let mut out = text.replace(env!("CARGO_PKG_VERSION"), "VERSION");
    let dir = d.dir.to_string_lossy().into_owned();
    out = out.replace(&dir, "CASE_DIR");
    if let Some(i) = out.find("SHA256:") {
        let end = out[i + 7..]
            .find(|c: char| !c.is_ascii_hexdigit())
            .map_or(out.len(), |e| i + 7 + e);
        out.replace_range(i + 7..end, "KEY");
    }
    out
}

#[test]
fn the_card_of_a_scripted_run_is_as_recorded() {
    if python(&[]).is_none() {
        return;
    }
    let d = scripted_case().run_spec().success();
    let card = d.read("out/card.md");
    snapshot("scripted-card.md", &redact(&card, &d));
}

/// The error output of a handful of refusals, byte for byte.
#[test]
fn refusals_print_as_recorded() {
    // Exit codes as in README's table (`Error::code`): 3 for the data, 2 for the
    // spec. (A missing file is left out: its message is the system's own words.)
    let cases: [(&str, Case, i32); 4] = [
        (
            "refusal-leakage.txt",
            Case::new()
                .file("data.csv", DATA.replace("sn0,1.25,", "sn0,1,"))
                .file("scripted.py", SCRIPTED)
                .file("spec.yaml", SPEC)
                .keys(),
            3,
        ),
        (
            "refusal-label.txt",
            Case::new()
                .file("data.csv", DATA.replace("va1,7,anomaly", "va1,7,anomalous"))
                .file("scripted.py", SCRIPTED)
                .file("spec.yaml", SPEC)
                .keys(),
            3,
        ),
        (
            "refusal-not-a-number.txt",
            Case::new()
                .file("data.csv", DATA.replace("vn2,3,", "vn2,three,"))
                .file("scripted.py", SCRIPTED)
                .file("spec.yaml", SPEC)
                .keys(),
            3,
        ),
        (
            "refusal-unknown-field.txt",
            Case::new()
                .file("data.csv", DATA)
                .file("scripted.py", SCRIPTED)
                .file("spec.yaml", SPEC.replace("threshold:", "treshold:"))
                .keys(),
            2,
        ),
    ];
    for (name, case, code) in cases {
        let d = case.run_spec().exec();
        assert_eq!(d.code, code, "{name}: {}", d.stderr);
        assert!(!d.dir.join("out").exists(), "{name}: nothing written");
        snapshot(name, &redact(&d.stderr, &d));
    }
}
