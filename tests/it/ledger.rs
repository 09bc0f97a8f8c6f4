//! The sealed test split: a run chooses on validation only unless it is the
//! final run (`--open-test`), and every opening is on the test ledger.

use std::process::Command;

use crate::util::{rows, spec, standard, BIN, PROTOCOL};

fn ledger_lines(d: &std::path::Path) -> Vec<serde_json::Value> {
    std::fs::read_to_string(d.join("spec.test-ledger.jsonl"))
        .unwrap_or_default()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

#[test]
fn by_default_the_test_split_stays_sealed() {
    let d = standard(&rows(400, 12, 61))
        .args(["run", "spec.yaml", "--key", "key.pem", "--out", "out"])
        .success();
    assert!(d.stdout.contains("test split sealed"), "{}", d.stdout);
    let run = d.json("out/run.json");
    assert_eq!(run["test-opened"], false);
    assert!(run["test-openings"].is_null());
    assert_eq!(run["test-counts"]["anomaly"], 6);
    assert!(run["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .all(|c| c["test"].is_null()));
    let scores = d.read("out/scores.csv");
    assert!(scores
        .lines()
        .skip(1)
        .all(|l| l.split(',').nth(1) == Some("validation")));
    assert!(d.read("out/card.md").contains("The test split is sealed"));
    assert!(
        ledger_lines(&d.dir).is_empty(),
        "a sealed run writes no ledger entry"
    );
}

#[test]
fn a_final_run_opens_the_test_split_once_and_records_it() {
    let case = standard(&rows(400, 12, 62));
    let d = case.clone().run_spec().success();
    let run = d.json("out/run.json");
    assert_eq!(run["test-opened"], true);
    let entries = ledger_lines(&d.dir);
    assert_eq!(entries.len(), 1);
    assert_eq!(
        entries[0]["test-manifest"],
        run["split"]["manifest-blake3"]["test"]
    );
    assert_eq!(entries[0]["spec-blake3"], run["spec"]["blake3"]);
    assert_eq!(entries[0]["chosen"], run["selection"]["chosen"]);
    assert_eq!(run["test-openings"]["count"], 1);
    assert!(d
        .read("out/card.md")
        .contains("records 1 opening(s) of this test split"));

    // The same test rows opened again under another spec: a loud warning, and
    // the card says how often and under which specs.
    let other = spec(&["a", "b", "c"], PROTOCOL)
        .replace("title: Test card", "title: Test card, second try");
    let d2 = case
        .file("spec.yaml", other)
        .args([
            "run",
            "spec.yaml",
            "--key",
            "key.pem",
            "--out",
            "out2",
            "--open-test",
        ])
        .success();
    assert!(
        d2.stderr.contains(
            "anomark: warning: this test split has now been opened 2 times under 2 different specs"
        ),
        "{}",
        d2.stderr
    );
    let run2 = d2.json("out2/run.json");
    assert_eq!(run2["test-openings"]["count"], 2);
    assert_eq!(
        run2["test-openings"]["spec-blake3"]
            .as_array()
            .unwrap()
            .len(),
        2
    );
    assert!(d2.read("out2/card.md").contains("records 2 opening(s)"));
}

#[test]
fn concurrent_final_runs_lose_no_ledger_entry() {
    let case = standard(&rows(300, 10, 63));
    let children: Vec<_> = (0..4)
        .map(|k| {
            Command::new(BIN)
                .current_dir(case.dir.path())
                .args([
                    "run",
                    "spec.yaml",
                    "--key",
                    "key.pem",
                    "--out",
                    &format!("out{k}"),
                    "--open-test",
                ])
                .spawn()
                .unwrap()
        })
        .collect();
    for mut c in children {
        assert!(c.wait().unwrap().success());
    }
    let entries = ledger_lines(case.dir.path());
    assert_eq!(entries.len(), 4);
    let manifest = &entries[0]["test-manifest"];
    assert!(entries.iter().all(|e| &e["test-manifest"] == manifest));
}
