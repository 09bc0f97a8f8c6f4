//! Every spec in specs-examples/ parses and runs; the demo's result holds the
//! properties its scenario was built to show.

use std::path::Path;

use crate::util::Case;

#[test]
fn every_example_spec_runs() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let case = Case::new().keys();
    let mut n = 0;
    for entry in std::fs::read_dir(root.join("specs-examples")).unwrap() {
        let p = entry.unwrap().path();
        if p.extension().and_then(|e| e.to_str()) != Some("yaml") {
            continue;
        }
        n += 1;
        // An example with an external command needs its Python packages
        // (a skip without them, a failure under CI).
        let text = std::fs::read_to_string(&p).unwrap();
        if text.contains("\n  - command:")
            && crate::command::python(&["numpy", "sklearn"]).is_none()
        {
            continue;
        }
        let out = case.path(p.file_stem().unwrap().to_str().unwrap());
        let d = case
            .clone()
            .args([
                "run",
                p.to_str().unwrap(),
                "--key",
                "key.pem",
                "--out",
                out.to_str().unwrap(),
            ])
            .success();
        assert!(d.stdout.contains("chosen: "), "{}", d.stdout);
    }
    assert!(n >= 1);
}

/// The invented foundry: 10,000 passing and 24 failing housings. Its flow
/// defects break the die-temperature / fill-time relation, which only the
/// multivariate Gaussian sees, so it must be chosen, and its card carries the
/// leak-test caution.
#[test]
fn demo_chooses_the_multivariate_gaussian_and_warns() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let case = Case::new().keys();
    let spec = root.join("specs-examples/pump-housing-leak-screen.yaml");
    let d = case
        .args([
            "run",
            spec.to_str().unwrap(),
            "--key",
            "key.pem",
            "--out",
            "demo",
        ])
        .success();
    let run = d.json("demo/run.json");
    assert_eq!(run["selection"]["chosen"], "multivariate-gaussian");
    let c = &run["split"]["counts"];
    assert_eq!(
        (
            c["validation"]["anomaly"].as_u64(),
            c["test"]["anomaly"].as_u64()
        ),
        (Some(12), Some(12))
    );
    assert_eq!(c["train"]["normal"], 6000);
    let card = d.read("demo/card.html");
    assert!(card.contains("not a substitute for the pressure"));
    assert!(card.contains("invented"));
}
