//! `verify --data`: a card is trusted by recomputing it from its spec and data.

use crate::util::{csv, rows, standard, Case};

fn verify_data(case: &Case) -> crate::util::Done {
    case.clone()
        .args([
            "verify",
            "out",
            "--pubkey",
            "key.pub.pem",
            "--data",
            "--spec",
            "spec.yaml",
        ])
        .exec()
}

#[test]
fn a_run_recomputes_to_the_same_bytes() {
    for final_run in [false, true] {
        let case = standard(&rows(400, 12, 71));
        let mut args = vec!["run", "spec.yaml", "--key", "key.pem", "--out", "out"];
        if final_run {
            args.push("--open-test");
        }
        case.clone().args(args).success();
        let d = verify_data(&case);
        assert_eq!(d.code, 0, "{}", d.stderr);
        assert!(d
            .stdout
            .contains("recomputed from spec and data, every file matches"));
        // Recomputation adds nothing to the ledger.
        let ledger =
            std::fs::read_to_string(case.path("spec.test-ledger.jsonl")).unwrap_or_default();
        assert_eq!(ledger.lines().count(), usize::from(final_run));
    }
}

#[test]
fn changed_data_is_refused() {
    let r = rows(300, 10, 72);
    let case = standard(&r);
    case.clone().run_spec().success();
    let mut changed = r.clone();
    changed[5].1[0] += 0.5;
    std::fs::write(case.path("data.csv"), csv(&["a", "b", "c"], &changed)).unwrap();
    let d = verify_data(&case);
    assert_eq!(d.code, 1);
    assert!(
        d.stderr.contains("input `data.csv` has blake3"),
        "{}",
        d.stderr
    );
    assert!(d.stderr.contains("recomputation refused"), "{}", d.stderr);
}

/// A run whose numbers were edited and re-signed passes the signature check
/// but not the recomputation, which names the first difference.
#[test]
fn edited_and_resigned_numbers_are_caught() {
    let case = standard(&rows(300, 10, 73));
    case.clone().run_spec().success();
    let scores = case.path("out/scores.csv");
    let text = std::fs::read_to_string(&scores).unwrap();
    let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
    lines[3] = lines[3]
        .rsplit_once(',')
        .map(|(a, _)| format!("{a},0.5"))
        .unwrap();
    std::fs::write(&scores, lines.join("\n") + "\n").unwrap();
    // Re-sign with the same key, as a careless or dishonest author could.
    case.resign("scores.csv");
    let plain = case
        .clone()
        .args(["verify", "out", "--pubkey", "key.pub.pem"])
        .exec();
    assert_eq!(plain.code, 0, "{}", plain.stderr);
    let d = verify_data(&case);
    assert_eq!(d.code, 1);
    assert!(
        d.stderr.contains("`scores.csv` first differs at line 4"),
        "{}",
        d.stderr
    );
}

#[test]
fn data_alone_finds_the_spec_where_the_run_recorded_it() {
    let case = standard(&rows(200, 8, 74));
    case.clone().run_spec().success();
    let run = case
        .clone()
        .args(["verify", "out", "--pubkey", "key.pub.pem"])
        .success();
    assert_eq!(
        run.json("out/run.json")["spec"]["path-from-run"],
        "../spec.yaml"
    );
    let d = case
        .clone()
        .args(["verify", "out", "--pubkey", "key.pub.pem", "--data"])
        .success();
    assert!(d.stdout.contains("every file matches"));
    // --spec without --data is a usage error.
    let u = case
        .args([
            "verify",
            "out",
            "--pubkey",
            "key.pub.pem",
            "--spec",
            "spec.yaml",
        ])
        .exec();
    assert_eq!(u.code, 2);
}
