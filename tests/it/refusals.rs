//! Bad inputs a hostile user would try: each is refused with the documented
//! exit code and a message that names the right thing.

use crate::util::{rows, spec, standard, Case, PROTOCOL};

/// `--templates` naming a folder that does not exist is a file problem
/// (exit 4), not silently the built-in card.
#[test]
fn templates_folder_that_is_missing_is_refused() {
    let d = standard(&rows(50, 4, 1))
        .run_spec()
        .args([
            "run",
            "spec.yaml",
            "--key",
            "key.pem",
            "--out",
            "out",
            "--no-wall-clock",
            "--templates",
            "no-such-folder",
        ])
        .fails(4, &["no-such-folder", "templates"]);
    assert!(!d.dir.join("out").exists());
}

/// `--templates` naming a regular file is refused (exit 4).
#[test]
fn templates_path_that_is_a_file_is_refused() {
    let d = standard(&rows(50, 4, 1))
        .file("card.md", "# {{ title }}\n")
        .args([
            "run",
            "spec.yaml",
            "--key",
            "key.pem",
            "--out",
            "out",
            "--no-wall-clock",
            "--templates",
            "card.md",
        ])
        .fails(4, &["card.md", "Not a directory"]);
    assert!(!d.dir.join("out").exists());
}

fn signed_run() -> Case {
    let case = standard(&rows(300, 10, 11));
    case.clone().run_spec().success();
    case
}

/// Replaces `out/NAME` by a symbolic link to an identical copy outside the run.
fn link_to_copy(case: &Case, name: &str) {
    let p = case.path(&format!("out/{name}"));
    let copy = case.path(&format!("copy-of-{name}"));
    std::fs::copy(&p, &copy).unwrap();
    std::fs::remove_file(&p).unwrap();
    std::os::unix::fs::symlink(&copy, &p).unwrap();
}

fn verify(case: &Case) -> crate::util::Done {
    case.clone()
        .args(["verify", "out", "--pubkey", "key.pub.pem"])
        .exec()
}

/// A signed file replaced by a link to an identical copy is a verification
/// failure naming it: a run directory holds regular files only.
#[test]
fn verify_refuses_a_signed_file_that_is_a_symlink() {
    let case = signed_run();
    link_to_copy(&case, "run.json");
    let d = verify(&case);
    assert_eq!(d.code, 1, "{}", d.stderr);
    assert!(
        d.stderr.contains("`run.json` is a symbolic link"),
        "{}",
        d.stderr
    );
}

/// The same for the manifest and its signature.
#[test]
fn verify_refuses_a_manifest_that_is_a_symlink() {
    for name in ["manifest.json", "manifest.sig"] {
        let case = signed_run();
        link_to_copy(&case, name);
        let d = verify(&case);
        assert_eq!(d.code, 1, "{name}: {}", d.stderr);
        assert!(
            d.stderr.contains(&format!("`{name}` is a symbolic link")),
            "{}",
            d.stderr
        );
    }
}

/// An extra folder, even an empty one, is not part of a signed run.
#[test]
fn verify_refuses_an_extra_empty_folder() {
    let case = signed_run();
    std::fs::create_dir(case.path("out/extra")).unwrap();
    let d = verify(&case);
    assert_eq!(d.code, 1, "{}", d.stderr);
    assert!(
        d.stderr
            .contains("`extra` is a folder the manifest does not cover"),
        "{}",
        d.stderr
    );
}

/// `score --pubkey` refuses such a run as `verify` does.
#[test]
fn score_with_pubkey_refuses_a_run_holding_a_symlink() {
    let case = signed_run();
    link_to_copy(&case, "card.md");
    let d = case
        .clone()
        .args([
            "score",
            "out",
            "data.csv",
            "--out",
            "scored.csv",
            "--pubkey",
            "key.pub.pem",
        ])
        .fails(1, &["`card.md` is a symbolic link"]);
    assert!(!d.dir.join("scored.csv").exists());
}

/// `score` given a data file that does not exist: a file problem (exit 4,
/// README's table), not a data refusal.
#[test]
fn score_with_a_missing_data_file_is_a_file_problem() {
    let case = signed_run();
    case.clone()
        .args(["score", "out", "nowhere.csv", "--out", "scored.csv"])
        .fails(4, &["nowhere.csv", "No such file"]);
}

/// A folder of Parquet parts with a dangling `.parquet` link: a file problem
/// naming the link.
#[test]
fn dangling_parquet_link_in_a_folder_is_a_file_problem() {
    let case = Case::new()
        .file(
            "spec.yaml",
            spec(&["a", "b", "c"], PROTOCOL).replace("path: data.csv", "path: parts"),
        )
        .keys();
    crate::sources::parquet(&case.path("parts/part-0.parquet"), &rows(300, 10, 3), false);
    std::os::unix::fs::symlink("gone.parquet", case.path("parts/part-1.parquet")).unwrap();
    let d = case.run_spec().fails(4, &["part-1.parquet"]);
    assert!(!d.dir.join("out").exists());
}

/// A `.parquet` link that points at itself: a file problem naming it.
#[test]
fn looping_parquet_link_in_a_folder_is_a_file_problem() {
    let case = Case::new()
        .file(
            "spec.yaml",
            spec(&["a", "b", "c"], PROTOCOL).replace("path: data.csv", "path: parts"),
        )
        .keys();
    crate::sources::parquet(&case.path("parts/part-0.parquet"), &rows(300, 10, 3), false);
    std::os::unix::fs::symlink("part-1.parquet", case.path("parts/part-1.parquet")).unwrap();
    let d = case.run_spec().fails(4, &["part-1.parquet"]);
    assert!(!d.dir.join("out").exists());
}

/// A data file without read permission is a file problem (exit 4). Skipped
/// when the tests run with a user that reads every file (root); the unit test
/// `data::tests::an_io_error_from_the_reader_is_a_file_problem` covers the
/// mapping itself.
#[test]
fn unreadable_data_file_is_a_file_problem() {
    use std::os::unix::fs::PermissionsExt;
    let case = standard(&rows(50, 4, 1));
    let p = case.path("data.csv");
    std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o000)).unwrap();
    if std::fs::read(&p).is_ok() {
        return;
    }
    case.clone().run_spec().fails(4, &["data.csv"]);
}

/// Runs with a time limit and expects exit 4, a message with every piece,
/// and never "no such file".
fn refused_within(case: &Case, pieces: &[&str]) -> crate::util::Done {
    let d = case.exec_within(std::time::Duration::from_secs(60));
    assert_eq!(d.code, 4, "stderr: {}", d.stderr);
    for p in pieces {
        assert!(d.stderr.contains(p), "`{p}` not in: {}", d.stderr);
    }
    assert!(!d.stderr.contains("No such file"), "{}", d.stderr);
    assert!(!d.stderr.contains("no such file"), "{}", d.stderr);
    d
}

fn mkfifo(path: &std::path::Path) {
    let ok = std::process::Command::new("mkfifo")
        .arg(path)
        .status()
        .unwrap()
        .success();
    assert!(ok, "mkfifo failed");
}

/// `data.path: /dev/zero` is refused as a device, not read without end and
/// not called missing.
#[test]
fn data_path_that_is_a_device_is_refused() {
    let case = standard(&rows(50, 4, 1)).file(
        "spec.yaml",
        spec(&["a", "b", "c"], PROTOCOL).replace("path: data.csv", "path: /dev/zero"),
    );
    let d = refused_within(
        &case.run_spec(),
        &["/dev/zero", "a character device, not a regular file"],
    );
    assert!(!d.dir.join("out").exists());
}

/// A fifo named like a Parquet part inside a data folder is refused, not
/// opened (opening it would block for ever).
#[test]
fn fifo_in_a_data_folder_is_refused() {
    let case = Case::new()
        .file(
            "spec.yaml",
            spec(&["a", "b", "c"], PROTOCOL).replace("path: data.csv", "path: parts"),
        )
        .keys();
    crate::sources::parquet(&case.path("parts/part-0.parquet"), &rows(300, 10, 3), false);
    mkfifo(&case.path("parts/part-1.parquet"));
    refused_within(&case.run_spec(), &["part-1.parquet", "a fifo"]);
}

/// `score` with a fifo as its input is refused before anything is read.
#[test]
fn score_input_that_is_a_fifo_is_refused() {
    let case = signed_run();
    mkfifo(&case.path("new.csv"));
    refused_within(
        &case
            .clone()
            .args(["score", "out", "new.csv", "--out", "scored.csv"]),
        &["new.csv", "a fifo"],
    );
}

/// A final run whose ledger is `/dev/full` is refused before any work, not
/// read without end.
#[test]
fn ledger_that_is_a_device_is_refused() {
    let case = standard(&rows(50, 4, 1)).file(
        "spec.yaml",
        format!("{}ledger: /dev/full\n", spec(&["a", "b", "c"], PROTOCOL)),
    );
    let d = refused_within(
        &case.run_spec(),
        &["/dev/full", "test ledger", "a character device"],
    );
    assert!(!d.dir.join("out").exists());
}

/// A ledger that is a fifo is refused the same way.
#[test]
fn ledger_that_is_a_fifo_is_refused() {
    let case = standard(&rows(50, 4, 1)).file(
        "spec.yaml",
        format!("{}ledger: pipe.jsonl\n", spec(&["a", "b", "c"], PROTOCOL)),
    );
    mkfifo(&case.path("pipe.jsonl"));
    refused_within(&case.run_spec(), &["pipe.jsonl", "a fifo"]);
}
