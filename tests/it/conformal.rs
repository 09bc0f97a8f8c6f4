//! Issue 30: the conformal threshold policy, conformal p-values and
//! Benjamini-Hochberg flagging in `score`, and the drift report, end to end.

use crate::util::*;

fn conformal_case(r: &Rows, a: &str) -> Case {
    let spec = spec(&["a", "b", "c"], PROTOCOL).replace(
        "threshold: max-f1",
        &format!("threshold:\n  conformal:\n    max-false-positive-rate: {a}"),
    );
    Case::new()
        .file("data.csv", csv(&["a", "b", "c"], r))
        .file("spec.yaml", spec)
        .keys()
}

/// Column `name` of a scored CSV as text, one entry per row.
fn column(text: &str, name: &str) -> Vec<String> {
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let j = header.iter().position(|h| *h == name).unwrap();
    lines
        .map(|l| l.split(',').nth(j).unwrap().to_string())
        .collect()
}

/// The run keeps its calibration scores; τ is the ⌈(1 − A)(n + 1)⌉-th
/// smallest of them; `score --fdr` writes p-values that follow the
/// definition, the policy's flag (s > τ) equals p ≤ A on every row, and the
/// FDR flags are Benjamini-Hochberg's (computed here directly from the
/// written p-values).
#[test]
fn conformal_run_and_fdr_scoring_follow_the_definitions() {
    let r = rows(600, 24, 43);
    let case = conformal_case(&r, "0.05");
    let d = case.clone().run_spec().success();
    let run = d.json("out/run.json");
    let cal: Vec<f64> = run["calibration"]["sorted-scores"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap())
        .collect();
    let n = cal.len();
    assert_eq!(run["calibration"]["validation-normals"], n);
    assert!(cal.windows(2).all(|w| w[0] <= w[1]));
    let chosen = run["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["chosen"] == true)
        .unwrap();
    let tau = chosen["tau"].as_f64().unwrap();
    // k = ⌈0.95 (n + 1)⌉, in integers: ⌈95 (n + 1) / 100⌉.
    let k = (95 * (n + 1)).div_ceil(100);
    assert_eq!(tau, cal[k - 1]);
    assert_eq!(
        run["drift-reference"]["features"].as_array().unwrap().len(),
        3
    );
    let card = d.read("out/card.md");
    for piece in [
        "The conformal false-alarm guarantee",
        "exchangeable",
        "Per candidate, not for the selection",
        "On the test split:",
    ] {
        assert!(card.contains(piece), "`{piece}` not in the card");
    }
    assert!(d
        .read("out/card.html")
        .contains("Per candidate, not for the selection"));

    // A new batch of 50 normals and 10 anomalies: with n validation normals
    // the smallest p-value is 1/(n + 1), so BH can flag only when k Q / m
    // reaches it; a small batch lets it.
    let new = rows(50, 10, 49);
    let case = case.file("new.csv", csv(&["a", "b", "c"], &new));
    let s = case
        .clone()
        .args([
            "score",
            "out",
            "new.csv",
            "--out",
            "scored.csv",
            "--fdr",
            "0.1",
            "--json",
            "--report",
            "drift.html",
        ])
        .success();
    let summary: serde_json::Value = serde_json::from_str(&s.stdout).unwrap();
    let text = s.read("scored.csv");
    let scores: Vec<f64> = column(&text, "anomark_score")
        .iter()
        .map(|v| v.parse().unwrap())
        .collect();
    let p: Vec<f64> = column(&text, "anomark_p_value")
        .iter()
        .map(|v| v.parse().unwrap())
        .collect();
    let flag: Vec<bool> = column(&text, "anomark_flag")
        .iter()
        .map(|v| v == "true")
        .collect();
    let fdr: Vec<bool> = column(&text, "anomark_fdr_flag")
        .iter()
        .map(|v| v == "true")
        .collect();
    assert_eq!(p.len(), new.len());
    for i in 0..p.len() {
        // The definition: (1 + #{calibration ≥ s}) / (n + 1).
        let want = (1 + cal.iter().filter(|&&c| c >= scores[i]).count()) as f64 / (n + 1) as f64;
        assert_eq!(p[i], want, "row {i}");
        assert_eq!(flag[i], p[i] <= 0.05, "row {i}: s > τ and p ≤ A disagree");
    }
    // Benjamini-Hochberg by its definition (Benjamini and Hochberg 1995):
    // the largest k with p₍ₖ₎ ≤ k Q / m; reject every p ≤ p₍ₖ₎.
    let mut sorted = p.clone();
    sorted.sort_by(f64::total_cmp);
    let m = sorted.len() as f64;
    let cut = (0..sorted.len())
        .rev()
        .find(|&k| sorted[k] <= (k + 1) as f64 * 0.1 / m)
        .map(|k| sorted[k]);
    for i in 0..p.len() {
        assert_eq!(fdr[i], cut.is_some_and(|c| p[i] <= c), "row {i}");
    }
    let flagged = fdr.iter().filter(|&&f| f).count();
    assert!(flagged > 0);
    assert_eq!(summary["fdr"]["flagged"], flagged);
    assert_eq!(summary["fdr"]["p-cut"].as_f64(), cut);
    assert_eq!(summary["fdr"]["calibration-normals"], n);
    let rates = summary["drift"]["flag-rate"].as_array().unwrap();
    assert_eq!(rates.len(), 2);
    assert_eq!(rates[1]["expected"], 0.05);
    let html = s.read("drift.html");
    assert!(
        html.contains("<h1>Drift report</h1>") && html.contains("Benjamini-Hochberg at Q = 0.1")
    );
    assert!(!html.contains("<script") && !html.contains("http"));
}

#[test]
fn a_level_below_one_over_n_plus_one_is_refused_with_the_count_needed() {
    let r = rows(300, 20, 44);
    conformal_case(&r, "0.0001").run_spec().fails(
        3,
        &[
            "threshold `conformal`",
            "needs at least `9999` validation normal rows",
        ],
    );
    conformal_case(&r, "1").run_spec().fails(
        2,
        &["`max-false-positive-rate` must lie strictly between 0 and 1"],
    );
}

/// `check` reports in advance, with the run's own words, a conformal level
/// that the planned validation split is too small for (and exits 1).
#[test]
fn check_reports_a_level_the_validation_split_cannot_reach() {
    let r = rows(300, 20, 44);
    let d = conformal_case(&r, "0.0001")
        .args(["check", "spec.yaml"])
        .exec();
    assert_eq!(d.code, 1, "{}{}", d.stdout, d.stderr);
    assert!(
        d.stdout
            .contains("needs at least `9999` validation normal rows, and the validation split has"),
        "{}",
        d.stdout
    );
    let ok = conformal_case(&r, "0.1")
        .args(["check", "spec.yaml"])
        .exec();
    assert_eq!(ok.code, 0, "{}{}", ok.stdout, ok.stderr);
}

#[test]
fn fdr_levels_outside_the_open_unit_interval_are_refused() {
    let r = rows(300, 20, 45);
    let case = standard(&r);
    case.clone().run_spec().success();
    for q in ["0", "1", "1.5", "x"] {
        let d = case
            .clone()
            .args(["score", "out", "data.csv", "--out", "s.csv", "--fdr", q])
            .exec();
        assert_eq!(d.code, 2, "{q}: {}", d.stderr);
        assert!(
            d.stderr.contains("strictly between 0 and 1"),
            "{}",
            d.stderr
        );
        assert!(!case.path("s.csv").exists());
    }
}

/// A batch shifted by two standard deviations in `a` is flagged far more
/// often than validation predicts: a warning on stderr, and the feature's
/// shift and KS statistic show where.
#[test]
fn a_shifted_batch_is_reported_as_drift() {
    let r = rows(600, 24, 46);
    let case = conformal_case(&r, "0.05");
    case.clone().run_spec().success();
    let shifted: Rows = rows(400, 0, 47)
        .into_iter()
        .map(|(id, mut x, a)| {
            x[0] += 2.0;
            (id, x, a)
        })
        .collect();
    let case = case.file("new.csv", csv(&["a", "b", "c"], &shifted));
    let s = case
        .clone()
        .args(["score", "out", "new.csv", "--out", "s.csv", "--json"])
        .success();
    assert!(
        s.stderr.contains("outside the p-chart limits"),
        "{}",
        s.stderr
    );
    let j: serde_json::Value = serde_json::from_str(&s.stdout).unwrap();
    let f = &j["drift"]["features"];
    assert!(f[0]["shift-in-sd"].as_f64().unwrap() > 1.5, "{f}");
    assert!(f[0]["ks-statistic"].as_f64().unwrap() > 0.5, "{f}");
    assert!(f[2]["shift-in-sd"].as_f64().unwrap().abs() < 0.3, "{f}");
    assert_eq!(j["drift"]["flag-rate"][1]["expected"], 0.05);
    assert!(j["drift"]["flag-rate"][1]["outside-limits"] == true);
    // Unshifted data from the same process stays quiet.
    let calm = case
        .file("calm.csv", csv(&["a", "b", "c"], &rows(400, 0, 48)))
        .args(["score", "out", "calm.csv", "--out", "c.csv", "--json"])
        .success();
    assert!(!calm.stderr.contains("outside"), "{}", calm.stderr);
}

/// `--fdr` output and the drift summary are the same bytes on one thread or
/// many (the first pass's counts and the drift sums run in row order).
#[test]
fn fdr_scoring_is_the_same_on_any_thread_count() {
    let r = rows(500, 20, 50);
    let case = conformal_case(&r, "0.1");
    case.clone().run_spec().success();
    let mut outs = vec![];
    for (threads, name) in [("1", "one.csv"), ("4", "four.csv")] {
        let d = case
            .clone()
            .args([
                "score", "out", "data.csv", "--out", name, "--fdr", "0.2", "--json",
            ])
            .env("RAYON_NUM_THREADS", threads)
            .env("POLARS_MAX_THREADS", threads)
            .success();
        let mut j: serde_json::Value = serde_json::from_str(&d.stdout).unwrap();
        j["out"] = serde_json::Value::Null;
        j["peak-rss-mib"] = serde_json::Value::Null;
        outs.push((d.read(name), j));
    }
    assert_eq!(outs[0], outs[1]);
}
