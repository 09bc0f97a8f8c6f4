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
    let sealed = case.clone().run_sealed().success();
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

/// The 95 % Wilson score interval of k successes in n trials (Wilson, 1927,
/// J. Am. Stat. Assoc. 22(158), 209–212; z = 1.959964, the 0.975 normal
/// quantile), written out here from the published formula.
fn wilson(k: f64, n: f64) -> (f64, f64) {
    let z = 1.959964f64;
    let p = k / n;
    let centre = (p + z * z / (2.0 * n)) / (1.0 + z * z / n);
    let half = z / (1.0 + z * z / n) * (p * (1.0 - p) / n + z * z / (4.0 * n * n)).sqrt();
    (centre - half, centre + half)
}

#[test]
fn the_card_answers_first_sealed_and_final() {
    let case = standard(&rows(300, 16, 21));
    let sealed = case.clone().run_sealed().success();
    let check = |d: &Done, split: &str| {
        let run = d.json("out/run.json");
        let chosen = run["candidates"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| c["chosen"] == true)
            .unwrap()
            .clone();
        let m = &chosen[split];
        let c = &m["confusion"];
        let (tp, fp, fn_) = (
            c["tp"].as_u64().unwrap(),
            c["fp"].as_u64().unwrap(),
            c["fn"].as_u64().unwrap(),
        );
        let html = d.read("out/card.html");
        let md = d.read("out/card.md");
        // The answer comes right under the title, before every other section.
        let answer = html
            .find("<section class=\"answer\"")
            .expect("an answer section");
        assert!(answer < html.find("<h2>").unwrap());
        assert!(html.find("<h1>").unwrap() < answer);
        assert!(md.find("**Chosen detector:").unwrap() < md.find("\n## ").unwrap());
        let name = chosen["name"].as_str().unwrap();
        assert!(html.contains(&format!("Chosen detector: <strong>{name}</strong>")));
        // The threshold, as recorded.
        let tau = format!("τ = {:.6}", chosen["tau"].as_f64().unwrap());
        assert!(html.contains(&tau) && md.contains(&tau), "{tau}");
        // The sentence in the spec's own label values, from the counts.
        let flagged = tp + fp;
        let sentence = format!(
            "Of {} known anomalies (“anomaly”) in the {split} split, {tp} were flagged; \
             {fp} of the {flagged} flagged rows were normal (“normal”).",
            tp + fn_
        );
        assert!(md.contains(&sentence), "{sentence}\n{md}");
        assert!(html.contains(&sentence), "{sentence}");
        // Precision with its Wilson interval, checked against the formula.
        let (lo, hi) = wilson(tp as f64, flagged as f64);
        let cell = format!(
            "{:.4}<span class=\"ci\">{lo:.3}–{hi:.3}</span>",
            tp as f64 / flagged as f64
        );
        assert!(html.contains(&cell), "{cell}");
        assert!(md.contains(&format!(
            "| precision | {:.4} ({lo:.3}–{hi:.3}) | Wilson score |",
            tp as f64 / flagged as f64
        )));
        // One interval per value in the tables; both kinds in the details.
        assert!(
            !html.contains("(W "),
            "stacked intervals left in the tables"
        );
        assert!(html.contains("<details id=\"interval-details\">"));
        assert!(md.contains("| Wilson 95 % | Clopper-Pearson 95 % |"));
        // The interval figure sits beside the table, inline and self-contained.
        let fig = html
            .find("<figure class=\"intervals\"")
            .expect("the interval figure");
        assert!(fig < html.find("<h2>").unwrap());
        assert!(html[fig..].contains("precision · "));
        // The caution stays.
        assert!(html.contains("not a substitute for inspections"));
        (html, md)
    };
    let (html, _) = check(&sealed, "validation");
    assert!(html.contains("The test split is sealed."));
    std::fs::remove_dir_all(sealed.dir.join("out")).unwrap();
    let d = case.run_spec().success();
    let (html, _) = check(&d, "test");
    assert!(!html.contains("The test split is sealed."));
    assert!(html.contains("On the test split, opened once"));
}
