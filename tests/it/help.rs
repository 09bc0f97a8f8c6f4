//! Help for a new user: every command's `--help` ends with an example taken
//! from the README, `run` without a key says how to make one, and shell
//! completions and man pages are generated from the same command definition.

use std::process::Command;

use crate::util::*;

const README: &str = include_str!("../../README.md");

#[test]
fn every_help_ends_with_an_example_from_the_readme() {
    let mut names: Vec<String> = anomark::cli::command()
        .get_subcommands()
        .map(|c| c.get_name().to_string())
        .collect();
    names.sort();
    let mut listed: Vec<String> = anomark::cli::EXAMPLES
        .iter()
        .map(|(n, _)| n.to_string())
        .collect();
    listed.sort();
    assert_eq!(names, listed, "a command without an example");
    // `anomark --help` itself ends with the first step on one's own data.
    let d = Case::new().args(["--help"]).success();
    assert_eq!(
        d.stdout.trim_end().lines().last().unwrap().trim(),
        anomark::cli::EX_INIT
    );
    for &(name, example) in anomark::cli::EXAMPLES {
        let d = Case::new().args([name, "--help"]).success();
        let last = d.stdout.trim_end().lines().last().unwrap().trim();
        assert_eq!(last, example, "`anomark {name} --help` ends with: {last}");
        assert!(
            README.contains(example),
            "the example of `{name}` is not in the README: {example}"
        );
    }
}

#[test]
fn run_without_a_key_says_how_to_make_one() {
    let case = standard(&rows(50, 4, 1));
    case.clone()
        .args(["run", "spec.yaml", "--out", "out"])
        .fails(
            2,
            &[
                "--key",
                "anomark keygen --private key.pem --public key.pub.pem",
            ],
        );
    assert!(!case.path("out").exists());
}

#[test]
fn completions_for_four_shells_and_the_man_page() {
    for shell in ["bash", "zsh", "fish", "powershell"] {
        let d = Case::new().args(["completions", shell]).success();
        for sub in ["init", "keygen", "completions"] {
            assert!(d.stdout.contains(sub), "{shell}: no `{sub}`");
        }
    }
    // bash itself parses the bash script (`bash -n`: read, do not run).
    let d = Case::new().args(["completions", "bash"]).success();
    let script = d.dir.join("anomark.bash");
    std::fs::write(&script, &d.stdout).unwrap();
    if let Ok(out) = Command::new("bash").arg("-n").arg(&script).output() {
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    // A roff man page: the title macro names the program and section 1
    // (man-pages(7): `.TH title section date source manual`).
    let d = Case::new().args(["man"]).success();
    assert!(d.stdout.contains(".TH anomark 1"), "{}", d.stdout);
    assert!(d.stdout.contains(".SH NAME"));
    let d = Case::new().args(["man", "--out", "man1"]).success();
    for page in [
        "anomark.1",
        "anomark-init.1",
        "anomark-run.1",
        "anomark-completions.1",
    ] {
        let text = d.read(&format!("man1/{page}"));
        assert!(text.contains(".TH "), "{page}");
    }
    assert!(d.read("man1/anomark-run.1").contains("keygen"));
    // Pages are never overwritten.
    Case::new()
        .file("man1/anomark.1", "mine")
        .args(["man", "--out", "man1"])
        .fails(4, &["anomark.1", "already exists"]);
}
