//! `anomark check`: the dry run reports problems, counts and feature
//! summaries, with exit 0 (fine), 1 (problems) or 2 (spec error).

use crate::util::{csv, rows, spec, standard, PROTOCOL};

#[test]
fn a_clean_spec_passes_with_counts_and_summaries() {
    let d = standard(&rows(1000, 20, 21))
        .args(["check", "spec.yaml", "--json"])
        .exec();
    assert_eq!(d.code, 0, "{}{}", d.stdout, d.stderr);
    let v: serde_json::Value = serde_json::from_str(&d.stdout).unwrap();
    assert_eq!(v["counts"]["train"]["normal"], 600);
    assert_eq!(v["counts"]["validation"]["anomaly"], 10);
    assert_eq!(v["problems"].as_array().unwrap().len(), 0);
    let f = &v["features"][0];
    assert_eq!(f["name"], "a");
    assert!(f["sd"].as_f64().unwrap() > 0.5 && f["sd"].as_f64().unwrap() < 1.5);
    assert_eq!(f["share-missing"], 0.0);
    // No run directory: check writes nothing.
    assert!(!d.dir.join("out").exists());
}

#[test]
fn every_problem_is_listed_and_exit_is_one() {
    // Line 2 gets an undeclared label, line 4 a non-numeric value in `b`.
    let mut lines: Vec<String> = csv(&["a", "b", "c"], &rows(100, 6, 22))
        .lines()
        .map(str::to_string)
        .collect();
    lines[1] = lines[1].replace(",normal", ",Normal");
    let mut f: Vec<String> = lines[3].split(',').map(str::to_string).collect();
    f[2] = "oops".into();
    lines[3] = f.join(",");
    let text = lines.join("\n") + "\n";
    let d = standard(&rows(100, 6, 22))
        .file("data.csv", text)
        .args(["check", "spec.yaml"])
        .exec();
    assert_eq!(d.code, 1, "{}{}", d.stdout, d.stderr);
    assert!(d.stdout.contains("problems: 2"), "{}", d.stdout);
    assert!(
        d.stdout.contains("lines 4)") || d.stdout.contains("line 4)"),
        "{}",
        d.stdout
    );
    assert!(d.stdout.contains("(line 2)"), "{}", d.stdout);
    assert!(
        d.stdout.contains("value `oops` is not a number"),
        "{}",
        d.stdout
    );
    assert!(
        d.stdout.contains("label `Normal` is neither"),
        "{}",
        d.stdout
    );
}

#[test]
fn a_skewed_feature_gets_a_transform_hint() {
    let r: crate::util::Rows = rows(400, 10, 23)
        .into_iter()
        .map(|(id, mut x, a)| {
            x[2] = (x[2] * 1.5).exp();
            (id, x, a)
        })
        .collect();
    let d = standard(&r).args(["check", "spec.yaml"]).exec();
    assert_eq!(d.code, 0, "{}", d.stdout);
    assert!(d.stdout.contains("features/c:"), "{}", d.stdout);
    assert!(d.stdout.contains("right-skewed"), "{}", d.stdout);
    assert!(d.stdout.contains("`box-cox`"), "{}", d.stdout);
}

#[test]
fn a_spec_error_exits_with_two() {
    let d = standard(&rows(50, 4, 24))
        .file(
            "spec.yaml",
            spec(&["a", "b", "c"], PROTOCOL).replace("seed: 7", "sed: 7"),
        )
        .args(["check", "spec.yaml"])
        .fails(2, &["unknown field `sed`", "did you mean `seed`?"]);
    assert!(d.stdout.is_empty());
}

#[test]
fn a_missing_column_is_a_problem_with_a_suggestion() {
    let d = standard(&rows(50, 4, 25))
        .file("spec.yaml", spec(&["a", "bb", "c"], PROTOCOL))
        .args(["check", "spec.yaml"])
        .exec();
    assert_eq!(d.code, 1);
    assert!(
        d.stdout.contains("column `bb` is not in `data.csv`"),
        "{}",
        d.stdout
    );
    assert!(d.stdout.contains("did you mean `b`?"), "{}", d.stdout);
}

/// A feature constant on the would-be training rows is reported by `check`
/// in the words a run refuses it with (`rules::zero_variance`), under its
/// feature set.
#[test]
fn a_constant_feature_is_reported_as_the_run_refuses_it() {
    let r = crate::util::with_constant_c(rows(100, 4, 1));
    let d = standard(&r).args(["check", "spec.yaml"]).exec();
    assert_eq!(d.code, 1, "{}{}", d.stdout, d.stderr);
    let run = standard(&r).run_spec().fails(3, &["`c`"]);
    let words = "a feature has zero variance on the training rows (every value is the same), \
                 so its density is degenerate; drop it or fix the data (features: `c`)";
    assert!(d.stdout.contains(words), "{}", d.stdout);
    assert!(run.stderr.contains(words), "{}", run.stderr);
}
