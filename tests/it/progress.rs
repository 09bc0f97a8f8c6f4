//! Progress: drawn on a terminal, silent when stderr is a pipe or with
//! `--quiet`; `--json` prints a machine-readable summary.

use std::process::Command;

use crate::util::*;

#[test]
fn no_terminal_no_progress_and_json_summary() {
    let case = standard(&rows(300, 16, 51));
    let d = case
        .clone()
        .args(RUN.into_iter().chain(["--open-test", "--json"]))
        .success();
    assert_eq!(d.stderr, "", "stderr is a pipe here: nothing may be drawn");
    let s: serde_json::Value = serde_json::from_str(&d.stdout).unwrap();
    assert_eq!(s["chosen"], "multivariate-gaussian");
    assert_eq!(s["test-opened"], true);
    assert!(s["test-f1"].as_f64().is_some());
    let run = d.json("out/run.json");
    assert_eq!(s["tau"], run["candidates"][1]["tau"]);
}

/// Runs `anomark ARGS` under a pseudo-terminal (util-linux `script`) and
/// returns what the terminal saw.
fn on_a_terminal(case: &Case, args: &str) -> Option<String> {
    let script = ["/usr/bin/script", "/bin/script"]
        .into_iter()
        .find(|p| std::path::Path::new(p).exists())?;
    let out = Command::new(script)
        .current_dir(case.dir.path())
        .args(["-qec", &format!("{BIN} {args}"), "/dev/null"])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    Some(String::from_utf8_lossy(&out.stdout).into_owned())
}

#[test]
fn a_terminal_shows_the_stages_unless_quiet() {
    let case = standard(&rows(300, 16, 52));
    let Some(seen) = on_a_terminal(&case, "run spec.yaml --key key.pem --out out1") else {
        eprintln!("skipped: no `script` to make a pseudo-terminal");
        return;
    };
    for stage in [
        "reading the data",
        // The candidates of a feature set share one stage (fitted side by side).
        "fitting and thresholding",
        "multivariate-gaussian",
        "writing the card",
    ] {
        assert!(seen.contains(stage), "`{stage}` not shown: {seen}");
    }
    let quiet = on_a_terminal(&case, "run spec.yaml --key key.pem --out out2 --quiet").unwrap();
    assert!(!quiet.contains("fitting"), "{quiet}");
    assert!(quiet.contains("chosen: multivariate-gaussian"));
    let scored = on_a_terminal(&case, "score out1 data.csv --out s.csv").unwrap();
    assert!(scored.contains("scoring"), "{scored}");
}

/// `ANOMARK_STAGE_TIMES=1`: every stage and part prints one line, `anomark:
/// stage T s  NAME (at S s)`, S counted from the process's start; the
/// stages (not indented) end in order, each no earlier than it lasted; the
/// bootstrap parts have the form `bench/compare.py` sums.
#[test]
fn stage_times_name_each_stage_with_its_end() {
    let case = standard(&rows(300, 16, 53)).env("ANOMARK_STAGE_TIMES", "1");
    let d = case
        .clone()
        .args(RUN.into_iter().chain(["--open-test"]))
        .success();
    let seconds = |s: &str| -> f64 {
        let v = s
            .strip_suffix(" s")
            .unwrap_or_else(|| panic!("`{s}`: no ` s`"));
        assert!(
            v.len() > 4 && v.as_bytes()[v.len() - 4] == b'.',
            "`{s}`: not three decimals"
        );
        v.parse().unwrap()
    };
    let mut last_end = 0.0;
    let (mut stages, mut bootstraps) = (Vec::new(), 0);
    for line in d.stderr.lines() {
        let rest = line
            .strip_prefix("anomark: stage ")
            .unwrap_or_else(|| panic!("not a stage line: `{line}`"));
        let (took, rest) = rest.split_once("  ").unwrap();
        let (name, at) = rest.rsplit_once(" (at ").unwrap();
        let (took, at) = (seconds(took), seconds(at.strip_suffix(')').unwrap()));
        assert!(took <= at, "`{line}`: lasted longer than the process");
        if name == "  bootstrap" {
            bootstraps += 1;
        }
        if !name.starts_with(' ') {
            assert!(at >= last_end, "`{line}` ends before the stage before it");
            last_end = at;
            stages.push(name.to_string());
        }
    }
    // One bootstrap per candidate and split (two detectors, validation and test).
    assert_eq!(bootstraps, 4, "{}", d.stderr);
    for stage in [
        "reading the data",
        "splitting and checking for leakage",
        "the record, once the intervals are in",
        "signing and writing the run directory",
    ] {
        assert!(
            stages.iter().any(|s| s == stage),
            "no `{stage}`: {stages:?}"
        );
    }
}
