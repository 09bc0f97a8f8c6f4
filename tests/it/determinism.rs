//! The same spec and data give byte-identical outputs.

use crate::util::{rows, standard, RUN};

#[test]
fn two_runs_give_identical_scores_and_record_apart_from_the_clock() {
    let r = rows(800, 12, 9);
    let args = || RUN.into_iter().chain(["--open-test"]);
    let a = standard(&r).args(args()).success();
    let b = standard(&r).args(args()).success();
    assert_eq!(a.read("out/scores.csv"), b.read("out/scores.csv"));
    let strip = |mut v: serde_json::Value| {
        assert!(v["wall-clock"]["started-utc"].is_string());
        v["wall-clock"] = serde_json::Value::Null;
        v
    };
    assert_eq!(strip(a.json("out/run.json")), strip(b.json("out/run.json")));
}

#[test]
fn without_the_clock_every_byte_is_identical_even_the_signature() {
    let r = rows(800, 12, 10);
    // The same key in both directories, so the signatures can be compared.
    let first = standard(&r);
    let key = std::fs::read(first.path("key.pem")).unwrap();
    let second = crate::util::Case::new()
        .file("data.csv", crate::util::csv(&["a", "b", "c"], &r))
        .file(
            "spec.yaml",
            crate::util::spec(&["a", "b", "c"], crate::util::PROTOCOL),
        )
        .file("key.pem", &key);
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(
            second.path("key.pem"),
            std::fs::Permissions::from_mode(0o600),
        )
        .unwrap();
    }
    let a = first.run_spec().success();
    let b = second.run_spec().success();
    for f in [
        "run.json",
        "scores.csv",
        "card.md",
        "card.html",
        "manifest.json",
        "manifest.sig",
    ] {
        assert_eq!(
            a.read(&format!("out/{f}")),
            b.read(&format!("out/{f}")),
            "{f}"
        );
    }
    assert!(a.json("out/run.json")["wall-clock"].is_null());
}

/// The bootstrap and the k-nearest-neighbour search run on all cores; one
/// thread gives the same bytes.
#[test]
fn thread_count_does_not_change_a_byte() {
    let r = rows(500, 12, 11);
    let yaml = crate::util::spec(&["a", "b", "c"], crate::util::PROTOCOL).replace(
        "detectors: [independent-gaussian, multivariate-gaussian]",
        "detectors: [multivariate-gaussian, knn-distance]",
    );
    // Sealed runs, so that the shared ledger does not differ between them.
    let first = standard(&r).file("spec.yaml", &yaml);
    let sealed = |out: &'static str| {
        [
            "run",
            "spec.yaml",
            "--key",
            "key.pem",
            "--out",
            out,
            "--no-wall-clock",
        ]
    };
    let a = first.clone().args(sealed("out")).success();
    let b = first
        .clone()
        .args(sealed("out1"))
        .env("RAYON_NUM_THREADS", "1")
        .success();
    for f in ["run.json", "scores.csv", "card.md", "manifest.sig"] {
        assert_eq!(
            a.read(&format!("out/{f}")),
            b.read(&format!("out1/{f}")),
            "{f}"
        );
    }
}
