//! Issue 30: Benjamini-Hochberg, the two-sample Kolmogorov-Smirnov statistic
//! and the exact binomial test against reference libraries from the
//! registries: statsmodels' `multipletests(method="fdr_bh")`, scipy's
//! `ks_2samp` and `binomtest`, run by python3 on seeded random data.
//!
//! Without python3, scipy or statsmodels the test prints a skip; when `CI` is
//! set it fails instead (.ci/run installs them).

use std::process::Command;

use rand_chacha::rand_core::{Rng, SeedableRng};

const SCRIPT: &str = r#"
import json, sys
import numpy as np
from scipy.stats import ks_2samp, binomtest
from statsmodels.stats.multitest import multipletests
case = json.load(sys.stdin)
out = {"bh": [], "ks": [], "binom": []}
for p, q in case["bh"]:
    reject = multipletests(np.array(p), alpha=q, method="fdr_bh")[0]
    out["bh"].append([bool(r) for r in reject])
for a, b in case["ks"]:
    out["ks"].append(float(ks_2samp(np.array(a), np.array(b), method="exact" if len(a) * len(b) < 10000 else "asymp").statistic))
for k, n, p in case["binom"]:
    out["binom"].append(float(binomtest(k, n, p, alternative="two-sided").pvalue))
json.dump(out, sys.stdout)
"#;

fn python_ready() -> bool {
    Command::new("python3")
        .args([
            "-c",
            "import numpy, scipy.stats, statsmodels.stats.multitest",
        ])
        .output()
        .is_ok_and(|o| o.status.success())
}

#[test]
fn bh_ks_and_binomial_agree_with_statsmodels_and_scipy() {
    if !python_ready() {
        if std::env::var_os("CI").is_some() {
            panic!("CI is set but python3 with scipy and statsmodels was not found: .ci/run installs them");
        }
        eprintln!("skipped: python3 with scipy and statsmodels not found");
        return;
    }
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3030);
    let mut unif = move || ((rng.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64;
    // Random p-values, a share of them small, some tied (rounded to 3 places).
    let mut bh = vec![];
    for i in 0..40 {
        let m = 5 + i * 7;
        let p: Vec<f64> = (0..m)
            .map(|_| {
                let u = unif();
                let v = if unif() < 0.3 { u * 0.01 } else { u };
                if i % 2 == 0 {
                    (v * 1000.0).round() / 1000.0
                } else {
                    v
                }
            })
            .collect();
        bh.push((p, [0.05, 0.1, 0.2][i % 3]));
    }
    // Samples with ties (rounded) and shifted.
    let mut ks = vec![];
    for i in 0..30 {
        let (na, nb) = (5 + i * 3, 8 + i * 5);
        let shift = (i % 4) as f64 * 0.2;
        let round = i % 3 == 0;
        let mut draw = |s: f64| {
            let v = unif() + unif() + unif() + s;
            if round {
                (v * 10.0).round() / 10.0
            } else {
                v
            }
        };
        let a: Vec<f64> = (0..na).map(|_| draw(shift)).collect();
        let b: Vec<f64> = (0..nb).map(|_| draw(0.0)).collect();
        ks.push((a, b));
    }
    let binom: Vec<(u64, u64, f64)> = vec![
        (0, 20, 0.05),
        (7, 10, 0.5),
        (3, 400, 0.05),
        (31, 400, 0.05),
        (20, 400, 0.05),
        (12, 1000, 0.01),
        (0, 1000, 0.01),
        (55, 500, 0.08),
    ];
    let input = serde_json::json!({ "bh": bh, "ks": ks, "binom": binom });
    let mut child = Command::new("python3")
        .args(["-c", SCRIPT])
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    serde_json::to_writer(child.stdin.take().unwrap(), &input).unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success());
    let want: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();

    for (i, (p, q)) in bh.iter().enumerate() {
        let cut = anomark::conformal::bh(p, *q);
        let ours: Vec<bool> = p
            .iter()
            .map(|&v| cut.p_cut.is_some_and(|c| v <= c))
            .collect();
        let theirs: Vec<bool> = want["bh"][i]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_bool().unwrap())
            .collect();
        assert_eq!(ours, theirs, "case {i}");
        assert_eq!(cut.rejected as usize, theirs.iter().filter(|&&r| r).count());
    }
    for (i, (a, b)) in ks.iter().enumerate() {
        let d = anomark::drift::ks_two_sample(a, b);
        let theirs = want["ks"][i].as_f64().unwrap();
        assert!((d - theirs).abs() < 1e-12, "case {i}: {d} vs {theirs}");
    }
    for (i, &(k, n, p)) in binom.iter().enumerate() {
        let ours = anomark::drift::binomial_two_sided(k, n, p);
        let theirs = want["binom"][i].as_f64().unwrap();
        assert!(
            (ours - theirs).abs() <= 1e-9 * theirs.max(1e-300) + 1e-12,
            "case {i}: {ours} vs {theirs}"
        );
    }
}
