//! The model card's figures: which ones a run writes, that both cards use
//! them, that they are signed and self-contained, and that they carry the
//! run's own numbers.

use crate::util::*;

fn plot_files(d: &Done) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(d.dir.join("out"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".svg"))
        .collect();
    v.sort();
    v
}

#[test]
fn a_validation_run_draws_validation_figures_and_a_final_run_adds_test_figures() {
    let case = standard(&rows(300, 16, 21));
    let sealed = case
        .clone()
        .args([
            "run",
            "spec.yaml",
            "--key",
            "key.pem",
            "--out",
            "out",
            "--no-wall-clock",
        ])
        .success();
    let files = plot_files(&sealed);
    assert_eq!(
        files,
        [
            "plot-feature-01.svg",
            "plot-feature-02.svg",
            "plot-feature-03.svg",
            "plot-validation-objective.svg",
            "plot-validation-precision-recall.svg",
            "plot-validation-roc.svg",
            "plot-validation-scores.svg",
        ]
    );
    std::fs::remove_dir_all(sealed.dir.join("out")).unwrap();
    let d = case.run_spec().success();
    let files = plot_files(&d);
    assert_eq!(files.len(), 10, "{files:?}");
    for t in ["precision-recall", "roc", "scores"] {
        assert!(files.contains(&format!("plot-test-{t}.svg")), "{files:?}");
    }
    let md = d.read("out/card.md");
    let html = d.read("out/card.html");
    let manifest = d.json("out/manifest.json");
    for f in &files {
        // card.md links the sibling file; card.html carries the same SVG inline;
        // the manifest signs it.
        assert!(
            md.contains(&format!("]({f})")),
            "{f} not linked from card.md"
        );
        let svg = d.read(&format!("out/{f}"));
        assert!(svg.starts_with("<svg "), "{f}");
        assert!(html.contains(svg.trim_end()), "{f} not inline in card.html");
        assert!(
            manifest.to_string().contains(&format!("\"{f}\"")),
            "{f} not in manifest.json"
        );
    }
    // Self-contained: nothing outside the page is referenced (the SVG namespace
    // is a name, not a fetch).
    let outside = html.replace("xmlns=\"http://www.w3.org/2000/svg\"", "");
    for pat in ["http://", "https://", "src=", "<link", "@import", "url("] {
        assert!(!outside.contains(pat), "card.html references `{pat}`");
    }
}

#[test]
fn figures_mark_the_recorded_operating_point() {
    let d = standard(&rows(300, 16, 22)).run_spec().success();
    let run = d.json("out/run.json");
    let chosen = run["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["chosen"] == true)
        .unwrap()
        .clone();
    let ln_eps = chosen["ln-epsilon"].as_f64().unwrap();
    let tau = chosen["tau"].as_f64().unwrap();
    let v = &chosen["validation"]["confusion"];
    let (tp, fp, fn_) = (
        v["tp"].as_f64().unwrap(),
        v["fp"].as_f64().unwrap(),
        v["fn"].as_f64().unwrap(),
    );
    let objective = d.read("out/plot-validation-objective.svg");
    assert!(
        objective.contains(&format!("chosen ln ε = {ln_eps:.4}")),
        "{objective}"
    );
    let pr = d.read("out/plot-validation-precision-recall.svg");
    let (r, p) = (tp / (tp + fn_), tp / (tp + fp));
    assert!(
        pr.contains(&format!("chosen ε: recall {r:.3}, precision {p:.3}")),
        "operating point label missing"
    );
    assert!(d
        .read("out/plot-validation-scores.svg")
        .contains(&format!("τ = {tau:.4}")));
}

#[test]
fn feature_figures_escape_names_from_the_data() {
    let evil = "<script>alert(1)</script>";
    let d = Case::new()
        .file("data.csv", csv(&["a", "b", evil], &rows(200, 10, 13)))
        .file("spec.yaml", spec(&["a", "b", evil], PROTOCOL))
        .keys()
        .run_spec()
        .success();
    let svg = d.read("out/plot-feature-03.svg");
    assert!(!svg.contains(evil));
    assert!(svg.contains("&lt;script&gt;alert(1)&lt;/script&gt;"));
}
