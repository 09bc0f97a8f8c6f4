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
