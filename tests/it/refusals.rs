//! Bad inputs a hostile user would try: each is refused with the documented
//! exit code and a message that names the right thing.

use crate::util::{rows, standard};

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
