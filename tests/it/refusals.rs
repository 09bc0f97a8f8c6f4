//! Bad inputs a hostile user would try: each is refused with the documented
//! exit code and a message that names the right thing.

use crate::util::{rows, standard, Case};

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
