//! External commands as detectors: the exchange contract, the protocol around
//! it (no labels, ids or split names; test rows only in a final run), its
//! provenance, and every way a program can break the contract (exit 3,
//! nothing written).
//!
//! The program is `specs-examples/commands/mean_distance.py` (Python's
//! standard library only). Without a `python3` these tests print a skip;
//! when `CI` is set they fail instead.

use std::collections::BTreeMap;
use std::path::Path;

use crate::util::{csv, rows, spec, Case, Rows, PROTOCOL};

/// `python3` when it runs; else None (and a skip), or a panic under CI.
pub fn python(modules: &[&str]) -> Option<&'static str> {
    let mut c = std::process::Command::new("python3");
    c.arg("-c").arg(format!(
        "import {}",
        if modules.is_empty() {
            "sys".to_string()
        } else {
            modules.join(", ")
        }
    ));
    match c.output() {
        Ok(o) if o.status.success() => Some("python3"),
        _ => {
            if std::env::var_os("CI").is_some() {
                panic!(
                    "CI is set but `python3` with {modules:?} is missing: .ci/run installs them"
                );
            }
            eprintln!("skipped: no python3 with {modules:?}");
            None
        }
    }
}

fn scorer() -> String {
    let p = Path::new(env!("CARGO_MANIFEST_DIR")).join("specs-examples/commands/mean_distance.py");
    std::fs::read_to_string(p).unwrap()
}

/// The standard spec with the multivariate Gaussian and the command.
fn command_spec(extra_args: &str, more: &str) -> String {
    spec(&["a", "b", "c"], PROTOCOL).replace(
        "detectors: [independent-gaussian, multivariate-gaussian]",
        &format!(
            "detectors:
  - multivariate-gaussian
  - command:
      name: mean-distance
      run: [python3, scorer.py{extra_args}]
      inputs: [scorer.py]
{more}"
        ),
    )
}

fn case(data: &Rows, extra_args: &str, more: &str) -> Case {
    Case::new()
        .file("data.csv", csv(&["a", "b", "c"], data))
        .file("scorer.py", scorer())
        .file("spec.yaml", command_spec(extra_args, more))
        .keys()
}

/// scores.csv as (id → (split, score of each candidate)).
fn scores(text: &str) -> BTreeMap<String, (String, Vec<f64>)> {
    text.lines()
        .skip(1)
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            (
                f[0].to_string(),
                (
                    f[1].to_string(),
                    f[3..].iter().map(|v| v.parse().unwrap()).collect(),
                ),
            )
        })
        .collect()
}

/// The distance to the training mean in standard units (population sd),
/// computed here from the data file: the check of the command's scores
/// outside anomark (the definition of a standard score, any statistics
/// handbook; common practice, no source for the Euclidean sum).
fn standard_distance(train: &[&Vec<f64>], x: &[f64]) -> f64 {
    let m = train.len() as f64;
    let mut s = 0.0;
    for j in 0..x.len() {
        let mean = train.iter().map(|r| r[j]).sum::<f64>() / m;
        let var = train.iter().map(|r| (r[j] - mean).powi(2)).sum::<f64>() / m;
        s += ((x[j] - mean) / var.sqrt()).powi(2);
    }
    s.sqrt()
}

#[test]
fn a_command_is_scored_by_the_protocol_and_recorded() {
    if python(&[]).is_none() {
        return;
    }
    let data = rows(300, 16, 5);
    let c = case(&data, ", --copy-to, seen", "").run_spec();
    let d = c.success();
    let run = d.json("out/run.json");
    let cand = run["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["name"] == "mean-distance")
        .unwrap()
        .clone();
    let p = &cand["params"];
    assert_eq!(cand["detector"], "command");
    assert_eq!(p["detector"], "command");
    assert_eq!(
        p["run"],
        serde_json::json!(["python3", "scorer.py", "--copy-to", "seen"])
    );
    let want = blake3::hash(scorer().as_bytes()).to_hex().to_string();
    assert_eq!(p["inputs"][0]["path"], "scorer.py");
    assert_eq!(p["inputs"][0]["blake3"], want.as_str());
    // A final run: the validation invocation, then validation and test together.
    let inv = p["invocations"].as_array().unwrap();
    assert_eq!(inv.len(), 2);
    let counts = &run["split"]["counts"];
    let n =
        |s: &str| counts[s]["normal"].as_u64().unwrap() + counts[s]["anomaly"].as_u64().unwrap();
    assert_eq!(inv[0]["rows"].as_u64(), Some(n("validation")));
    assert_eq!(inv[0]["test-rows-included"], false);
    assert_eq!(inv[1]["rows"].as_u64(), Some(n("validation") + n("test")));
    assert_eq!(inv[1]["test-rows-included"], true);
    assert_eq!(inv[1]["train-rows"].as_u64(), Some(n("train")));
    assert_eq!(inv[1]["exit-status"], 0);
    assert_eq!(inv[1]["scores-blake3"].as_str().unwrap().len(), 64);

    // What the program saw: feature names and numbers only, no id, label
    // or split name, and the rows shuffled.
    let train_seen = d.read("seen/train.csv");
    let rows_seen = d.read("seen/rows.csv");
    assert_eq!(train_seen.lines().next(), Some("a,b,c"));
    assert_eq!(rows_seen.lines().next(), Some("a,b,c"));
    for text in [&train_seen, &rows_seen] {
        for word in ["normal", "anomaly", "validation", "test", "train", "r1"] {
            assert!(!text.lines().skip(1).any(|l| l.contains(word)), "{word}");
        }
    }
    assert_eq!(
        rows_seen.lines().count() as u64 - 1,
        n("validation") + n("test")
    );

    // The command's scores against the distance computed here, from the
    // rows that are in no scored split (the training rows).
    let scored = scores(&d.read("out/scores.csv"));
    let train: Vec<&Vec<f64>> = data
        .iter()
        .filter(|(id, _, _)| !scored.contains_key(id))
        .map(|(_, x, _)| x)
        .collect();
    assert_eq!(train.len() as u64, n("train"));
    let col = 1; // candidates in spec order: multivariate-gaussian, mean-distance
    for (id, x, _) in &data {
        if let Some((_, s)) = scored.get(id) {
            let want = standard_distance(&train, x);
            assert!(
                (s[col] - want).abs() <= 1e-12 * want.max(1.0),
                "{id}: {} vs {want}",
                s[col]
            );
        }
    }
    // The card names the command and what anomark cannot see.
    let card = d.read("out/card.md");
    assert!(card.contains("is an external command"), "{card}");
    assert!(card.contains("cannot see inside it"));
    assert!(card.contains(&want));
    // The signature covers it all.
    c.clone()
        .args(["verify", "out", "--pubkey", "key.pub.pem"])
        .success();
}

#[test]
fn test_rows_reach_the_program_only_in_a_final_run() {
    if python(&[]).is_none() {
        return;
    }
    let data = rows(300, 16, 6);
    let c = case(&data, ", --copy-to, seen", "");
    let d = c.clone().run_sealed().success();
    let run = d.json("out/run.json");
    let cand = &run["candidates"][1];
    let inv = cand["params"]["invocations"].as_array().unwrap();
    assert_eq!(inv.len(), 1);
    assert_eq!(inv[0]["test-rows-included"], false);
    let v = &run["split"]["counts"]["validation"];
    let nv = v["normal"].as_u64().unwrap() + v["anomaly"].as_u64().unwrap();
    assert_eq!(d.read("seen/rows.csv").lines().count() as u64 - 1, nv);
    // Every validation row is scored, and no test row is in scores.csv.
    let scored = scores(&d.read("out/scores.csv"));
    assert_eq!(scored.len() as u64, nv);
    assert!(scored.values().all(|(split, _)| split == "validation"));
}

/// A program that breaks the contract stops the run with exit 3, the
/// program's own last words, and no run directory.
#[test]
fn every_broken_contract_stops_the_run() {
    if python(&[]).is_none() {
        return;
    }
    let data = rows(200, 12, 7);
    let cases: [(&str, &str, &[&str]); 6] = [
        (
            ", --fail, exit",
            "",
            &[
                "command `mean-distance`",
                "exited with status 2",
                "| mean_distance: refusing on purpose",
            ],
        ),
        (
            ", --fail, nan",
            "",
            &["not a finite number", "`scores.csv`"],
        ),
        (
            ", --fail, count",
            "",
            &["score(s) but `rows.csv` holds", "one score per row"],
        ),
        (", --fail, missing", "", &["wrote no `scores.csv`"]),
        (
            ", --fail, sleep",
            "      timeout-seconds: 2\n",
            &[
                "did not finish within 2 s",
                "killed",
                "| mean_distance: sleeping",
            ],
        ),
        (
            ", --fail, random",
            "",
            &["not deterministic", "seed every random choice"],
        ),
    ];
    for (args, more, pieces) in cases {
        let c = case(&data, args, more).run_spec();
        let t = std::time::Instant::now();
        c.fails(3, pieces);
        assert!(t.elapsed().as_secs() < 60, "{args}");
        assert!(
            !c.path("out").exists(),
            "{args}: a run directory was written"
        );
    }
    // A program that cannot start.
    let c = case(&data, "", "").file(
        "spec.yaml",
        command_spec("", "").replace("[python3, scorer.py]", "[./no-such-program]"),
    );
    c.run_spec().fails(3, &["cannot start `./no-such-program`"]);
}

#[test]
fn a_timeout_kills_the_programs_process_group() {
    if python(&[]).is_none() {
        return;
    }
    // The program starts a child that would write a file after 4 s; the
    // timeout must take it down with its parent.
    let script = "import subprocess, sys, time\n\
                  subprocess.Popen([sys.executable, '-c', \
                  'import time; time.sleep(4); open(\"late.txt\", \"w\").write(\"x\")'])\n\
                  time.sleep(3600)\n";
    let data = rows(200, 12, 8);
    let c = case(&data, "", "      timeout-seconds: 1\n")
        .file("sleeper.py", script)
        .file(
            "spec.yaml",
            command_spec("", "      timeout-seconds: 1\n")
                .replace("[python3, scorer.py]", "[python3, sleeper.py]"),
        )
        .run_spec();
    c.fails(3, &["did not finish within 1 s"]);
    std::thread::sleep(std::time::Duration::from_secs(5));
    assert!(
        !c.path("late.txt").exists(),
        "the program's child outlived the timeout"
    );
}

#[test]
fn a_bad_command_entry_is_a_spec_error() {
    let data = rows(50, 4, 9);
    let bad = [
        (
            "      timeout-seconds: 0\n",
            "`timeout-seconds` must be between 1 and 86400",
        ),
        (
            "      timeout-seconds: 86401\n",
            "`timeout-seconds` must be between 1 and 86400",
        ),
    ];
    for (more, piece) in bad {
        case(&data, "", more).run_spec().fails(2, &[piece]);
    }
    let c = case(&data, "", "").file(
        "spec.yaml",
        command_spec("", "").replace("run: [python3, scorer.py]", "run: []"),
    );
    c.run_spec().fails(2, &["`run` must name a program"]);
    let c = case(&data, "", "").file(
        "spec.yaml",
        command_spec("", "").replace("name: mean-distance", "name: multivariate-gaussian"),
    );
    c.run_spec().fails(2, &["already used by another detector"]);
}

fn verify_data(c: &Case) -> crate::util::Done {
    c.clone()
        .args(["verify", "out", "--pubkey", "key.pub.pem", "--data"])
        .exec()
}

/// `verify --data` runs the program again: a deterministic one reproduces
/// every byte, one that is not fails naming the first differing row.
#[test]
fn verification_runs_the_program_again() {
    if python(&[]).is_none() {
        return;
    }
    let data = rows(200, 12, 10);
    for final_run in [false, true] {
        let c = case(&data, "", "");
        let mut args = vec!["run", "spec.yaml", "--key", "key.pem", "--out", "out"];
        if final_run {
            args.push("--open-test");
        }
        c.clone().args(args).success();
        let d = verify_data(&c);
        assert_eq!(d.code, 0, "{}", d.stderr);
    }
    let c = case(&data, ", --fail, random", "");
    c.clone()
        .args(["run", "spec.yaml", "--key", "key.pem", "--out", "out"])
        .success();
    let d = verify_data(&c);
    assert_eq!(d.code, 1, "{}", d.stderr);
    assert!(
        d.stderr
            .contains("`scores.csv` first differs at line 2 (row `"),
        "{}",
        d.stderr
    );
    assert!(
        d.stderr
            .contains("of validation: candidate `mean-distance` recorded"),
        "{}",
        d.stderr
    );
}

/// `score` with a run whose chosen candidate is a command runs the program
/// on the new rows with the run's training rows as `train`, so a row gets
/// the score the run's contract gives it; a changed program is refused.
#[test]
fn score_runs_the_chosen_command_on_new_rows() {
    if python(&[]).is_none() {
        return;
    }
    let data = rows(300, 16, 11);
    let only = |s: String| s.replace("  - multivariate-gaussian\n", "");
    let c = case(&data, "", "").file("spec.yaml", only(command_spec("", "")));
    let d = c.clone().run_spec().success();
    let run = d.json("out/run.json");
    assert_eq!(run["selection"]["chosen"], "mean-distance");
    let tau = run["candidates"][0]["tau"].as_f64().unwrap();
    let scored = scores(&d.read("out/scores.csv"));
    let train: Vec<&Vec<f64>> = data
        .iter()
        .filter(|(id, _, _)| !scored.contains_key(id))
        .map(|(_, x, _)| x)
        .collect();
    let new = rows(40, 5, 12);
    let c = c.file("new.csv", csv(&["a", "b", "c"], &new));
    let s = c
        .clone()
        .args(["score", "out", "new.csv", "--out", "scored.csv"])
        .success();
    let text = s.read("scored.csv");
    let header: Vec<&str> = text.lines().next().unwrap().split(',').collect();
    let at = |n: &str| header.iter().position(|h| *h == n).unwrap();
    let lines: Vec<Vec<&str>> = text
        .lines()
        .skip(1)
        .map(|l| l.split(',').collect())
        .collect();
    assert_eq!(lines.len(), new.len());
    for (l, (id, x, _)) in lines.iter().zip(&new) {
        assert_eq!(l[at("id")], id);
        let got: f64 = l[at("anomark_score")].parse().unwrap();
        let want = standard_distance(&train, x);
        assert!(
            (got - want).abs() <= 1e-12 * want.max(1.0),
            "{id}: {got} vs {want}"
        );
        assert_eq!(l[at("anomark_flag")] == "true", got > tau, "{id}");
    }
    // The program changed since the run: refused.
    let c = c.file("scorer.py", scorer() + "\n# changed\n");
    c.args(["score", "out", "new.csv", "--out", "scored2.csv"])
        .fails(1, &["`inputs` differs from the one the run recorded"]);
}

/// The example spec's isolation forest, run through anomark by the final
/// protocol, gives scikit-learn's own `IsolationForest` scores for the same
/// seed, computed here outside anomark from the demo data: −score_samples of
/// a forest of 100 trees with `random_state=7` fitted on the training rows
/// (sorted lexicographically, as the program documents). Reference:
/// scikit-learn's `sklearn.ensemble.IsolationForest`.
#[test]
fn isolation_forest_example_matches_scikit_learn() {
    let Some(py) = python(&["numpy", "sklearn"]) else {
        return;
    };
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let data_path = root.join("demo-data/pump-housings.csv");
    let spec =
        std::fs::read_to_string(root.join("specs-examples/pump-housing-isolation-forest.yaml"))
            .unwrap()
            .replace(
                "../demo-data/pump-housings.csv",
                data_path.to_str().unwrap(),
            )
            .replace("../runs/", "");
    let program =
        std::fs::read_to_string(root.join("specs-examples/commands/isolation_forest.py")).unwrap();
    let c = Case::new()
        .file("spec.yaml", spec)
        .file("commands/isolation_forest.py", program)
        .keys()
        .run_spec();
    let d = c.success();
    let run = d.json("out/run.json");
    assert_eq!(run["test-opened"], true);
    let text = d.read("out/scores.csv");
    let header: Vec<&str> = text.lines().next().unwrap().split(',').collect();
    let col = header
        .iter()
        .position(|h| *h == "isolation-forest")
        .unwrap();
    let scored: BTreeMap<String, f64> = text
        .lines()
        .skip(1)
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            (f[0].to_string(), f[col].parse().unwrap())
        })
        .collect();
    assert!(text.lines().skip(1).any(|l| l.contains(",test,")));
    // The reference, from the data file and the scored ids alone.
    let ids: String = scored.keys().map(|k| format!("{k}\n")).collect();
    let c = c.file("scored_ids.txt", ids).file(
        "reference.py",
        format!(
            "import csv, sys\n\
             import numpy as np\n\
             from sklearn.ensemble import IsolationForest\n\
             cols = ['shot_pressure_mpa', 'die_temp_c', 'fill_time_ms', 'cooling_time_s', 'vacuum_mbar', 'wall_thickness_mm']\n\
             scored = set(open('scored_ids.txt').read().split())\n\
             rows = list(csv.DictReader(open({:?})))\n\
             train = np.array([[float(r[c]) for c in cols] for r in rows if r['housing_id'] not in scored])\n\
             train = train[np.lexsort(train.T[::-1])]\n\
             f = IsolationForest(n_estimators=100, random_state=7).fit(train)\n\
             test = [r for r in rows if r['housing_id'] in scored]\n\
             s = -f.score_samples(np.array([[float(r[c]) for c in cols] for r in test]))\n\
             for r, v in zip(test, s):\n    print(r['housing_id'], repr(float(v)))\n",
            data_path.to_str().unwrap()
        ),
    );
    let out = std::process::Command::new(py)
        .arg("reference.py")
        .current_dir(c.dir.path())
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let reference = String::from_utf8(out.stdout).unwrap();
    let mut n = 0;
    for l in reference.lines() {
        let (id, v) = l.split_once(' ').unwrap();
        let want: f64 = v.parse().unwrap();
        let got = scored[id];
        assert!(
            (got - want).abs() <= 1e-12,
            "{id}: anomark {got}, scikit-learn {want}"
        );
        n += 1;
    }
    assert_eq!(n, scored.len());
    let card = d.read("out/card.md");
    assert!(card.contains("“isolation-forest” is an external command"));
}

/// A command's parameter count, which anomark cannot see, is recorded as
/// null in run.json, not as a number standing in for "unknown".
#[test]
fn a_commands_parameter_count_is_recorded_as_null() {
    if python(&[]).is_none() {
        return;
    }
    let d = case(&rows(300, 16, 5), "", "").run_spec().success();
    let run = d.json("out/run.json");
    let command = run["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["params"]["detector"] == "command")
        .expect("a command candidate");
    assert!(command["parameter-count"].is_null(), "{command}");
}
