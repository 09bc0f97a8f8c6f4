//! run.json reads back as the `RunRecord` that wrote it, and a record with a
//! field missing or of the wrong type is refused naming `run.json` and the
//! field (exit 4 for `score` and `diff`, exit 1 for `verify --data`), never
//! read as a default.

use crate::util::{rows, standard, Case};

/// Rewrites `out/run.json` with `edit` applied, then re-signs the manifest
/// with the run's key, so that only the record's content is at fault.
fn edit_and_resign(case: &Case, edit: impl FnOnce(&mut serde_json::Value)) {
    let run_path = case.path("out/run.json");
    let mut run: serde_json::Value =
        serde_json::from_slice(&std::fs::read(&run_path).unwrap()).unwrap();
    edit(&mut run);
    std::fs::write(&run_path, serde_json::to_vec_pretty(&run).unwrap()).unwrap();
    case.resign("run.json");
}

fn every_candidate(
    run: &mut serde_json::Value,
    f: impl Fn(&mut serde_json::Map<String, serde_json::Value>),
) {
    for c in run["candidates"].as_array_mut().unwrap() {
        f(c.as_object_mut().unwrap());
    }
}

fn no_tau(run: &mut serde_json::Value) {
    every_candidate(run, |c| {
        c.remove("tau");
    });
}

fn tau_as_text(run: &mut serde_json::Value) {
    every_candidate(run, |c| {
        c.insert("tau".into(), "high".into());
    });
}

/// A fresh signed final run in `out`.
fn signed_run(seed: u64) -> Case {
    let case = standard(&rows(300, 10, seed));
    case.clone().run_spec().success();
    case
}

/// Serialising the record read back gives run.json's bytes (a sealed and a
/// final run: `test` null and filled, `test-openings` null and filled).
#[test]
fn a_run_record_reads_back_to_the_same_bytes() {
    for open in [false, true] {
        let case = standard(&rows(300, 10, 91));
        let mut args = vec!["run", "spec.yaml", "--key", "key.pem", "--out", "out"];
        if open {
            args.push("--open-test");
        }
        case.clone().args(args).success();
        let dir = case.path("out");
        let rec = anomark::record::read_run(&dir).unwrap();
        assert_eq!(rec.test_opened, open);
        assert!(rec.wall_clock.is_some());
        let mut again = serde_json::to_vec_pretty(&rec).unwrap();
        again.push(b'\n');
        assert_eq!(
            String::from_utf8(again).unwrap(),
            std::fs::read_to_string(dir.join("run.json")).unwrap()
        );
    }
}

#[test]
fn score_refuses_a_record_without_tau() {
    let case = signed_run(92);
    edit_and_resign(&case, no_tau);
    case.clone()
        .args(["score", "out", "data.csv", "--out", "scored.csv"])
        .fails(4, &["run.json", "candidates[0]", "missing field `tau`"]);
    assert!(!case.path("scored.csv").exists(), "nothing half-written");
}

#[test]
fn score_refuses_a_record_with_a_field_of_the_wrong_type() {
    let case = signed_run(93);
    edit_and_resign(&case, tau_as_text);
    case.clone()
        .args(["score", "out", "data.csv", "--out", "scored.csv"])
        .fails(
            4,
            &["run.json", "field `candidates[0].tau`", "invalid type"],
        );
    // A required field of another part of the record.
    let case = signed_run(94);
    edit_and_resign(&case, |r| {
        r.as_object_mut().unwrap().remove("content-columns");
    });
    case.clone()
        .args(["score", "out", "data.csv", "--out", "scored.csv"])
        .fails(4, &["run.json", "missing field `content-columns`"]);
}

/// diff once read a missing τ as NaN and flagged nothing; now it refuses.
#[test]
fn diff_refuses_a_record_without_tau_or_with_a_wrong_type() {
    let case = signed_run(95);
    std::fs::create_dir(case.path("new")).unwrap();
    for f in ["run.json", "scores.csv", "spec.yaml"] {
        let from = case.path(&format!("out/{f}"));
        if from.exists() {
            std::fs::copy(from, case.path(&format!("new/{f}"))).unwrap();
        }
    }
    case.clone().args(["diff", "out", "new"]).success();
    edit_and_resign(&case, no_tau);
    case.clone()
        .args(["diff", "out", "new"])
        .fails(4, &["run.json", "candidates[0]", "missing field `tau`"]);
    std::fs::copy(case.path("new/run.json"), case.path("out/run.json")).unwrap();
    edit_and_resign(&case, |r| {
        r["test-opened"] = "yes".into();
    });
    case.clone()
        .args(["diff", "new", "out"])
        .fails(4, &["run.json", "field `test-opened`", "invalid type"]);
}

#[test]
fn verify_data_refuses_a_resigned_record_with_a_field_missing_or_mistyped() {
    let verify = |case: &Case| {
        case.clone().args([
            "verify",
            "out",
            "--pubkey",
            "key.pub.pem",
            "--data",
            "--spec",
            "spec.yaml",
        ])
    };
    let case = signed_run(96);
    edit_and_resign(&case, |r| {
        r.as_object_mut().unwrap().remove("inputs");
    });
    verify(&case).fails(1, &["run.json", "missing field `inputs`"]);
    let case = signed_run(97);
    edit_and_resign(&case, tau_as_text);
    verify(&case).fails(
        1,
        &["run.json", "field `candidates[0].tau`", "invalid type"],
    );
}
