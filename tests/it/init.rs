//! `anomark init`: a spec from the user's own file that `anomark check`
//! passes as written, on three shapes of data (the demo CSV, a CSV shaped
//! like the Wisconsin diagnostic breast cancer table, a Parquet file with
//! columns that must be left out), and its refusals.

use polars::prelude::*;
use rand_chacha::rand_core::{Rng, SeedableRng};

use crate::util::*;

/// How many features the spec lists (the list items before `split:`).
fn features(spec: &str) -> usize {
    spec[..spec.find("\nsplit:").unwrap()]
        .matches("\n    - \"")
        .count()
}

/// Runs `anomark check spec.yaml` in the case and expects no problem.
fn checks(case: &Case) -> Done {
    case.clone().args(["check", "spec.yaml"]).success()
}

#[test]
fn the_demo_data_gives_a_spec_that_checks() {
    let demo = std::fs::read(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/demo-data/pump-housings.csv"
    ))
    .unwrap();
    let case = Case::new().file("data/pump-housings.csv", demo);
    let d = case
        .clone()
        .args(["init", "data/pump-housings.csv", "--out", "spec.yaml"])
        .success();
    assert!(d.stdout.starts_with("wrote: spec.yaml"), "{}", d.stdout);
    let spec = d.read("spec.yaml");
    assert!(spec.contains("path: \"data/pump-housings.csv\""), "{spec}");
    assert!(spec.contains("id-column: \"housing_id\""), "{spec}");
    assert!(spec.contains("column: \"leak_test\""), "{spec}");
    // 24 of the 10,024 housings failed (demo-data/README.md): the rarer value.
    assert!(spec.contains("normal: \"pass\""), "{spec}");
    assert!(spec.contains("anomaly: \"fail\""), "{spec}");
    assert!(
        spec.contains("GUESSED: `fail` marks a known anomaly"),
        "{spec}"
    );
    for f in [
        "shot_pressure_mpa",
        "die_temp_c",
        "fill_time_ms",
        "cooling_time_s",
        "vacuum_mbar",
        "wall_thickness_mm",
    ] {
        assert!(spec.contains(&format!("    - \"{f}\"\n")), "{f}: {spec}");
    }
    assert!(spec.contains("seed: 1\n"));
    assert!(spec.contains("- independent-gaussian") && spec.contains("- multivariate-gaussian"));
    assert!(spec.contains("threshold: max-f1"));
    assert!(spec.contains("card:\n  title: \"<title>"));
    let c = checks(&case);
    assert!(c.stdout.contains("problems: none"), "{}", c.stdout);
}

/// A table shaped like the Wisconsin diagnostic breast cancer data (UCI
/// Machine Learning Repository, "Breast Cancer Wisconsin (Diagnostic)":
/// an `id` column, `diagnosis` with `M` (212 rows) and `B` (357 rows), and
/// the ten measurements as mean, standard error and worst, 30 columns). The
/// values are invented (seeded Gaussians, malignant rows shifted); only the
/// shape is the published one.
fn wdbc_shaped() -> String {
    const MEASURES: [&str; 10] = [
        "radius",
        "texture",
        "perimeter",
        "area",
        "smoothness",
        "compactness",
        "concavity",
        "concave_points",
        "symmetry",
        "fractal_dimension",
    ];
    let mut names = vec![];
    for kind in ["mean", "se", "worst"] {
        for m in MEASURES {
            names.push(format!("{m}_{kind}"));
        }
    }
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(569);
    let mut unif = move || ((rng.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64;
    let mut gauss = move || {
        let (u, v) = (unif(), unif());
        (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
    };
    let mut s = format!("id,diagnosis,{}\n", names.join(","));
    for i in 0..569usize {
        let malignant = i % 8 < 3 && i < 562; // 212 of 569
        s.push_str(&format!(
            "{},{}",
            842_302 + 7 * i * i + 13 * i,
            if malignant { "M" } else { "B" }
        ));
        for j in 0..30 {
            let shift = if malignant { 1.5 } else { 0.0 };
            s.push_str(&format!(",{:.5}", 10.0 + j as f64 + gauss() + shift));
        }
        s.push('\n');
    }
    s
}

#[test]
fn a_wdbc_shaped_table_gives_a_spec_that_checks_and_runs() {
    let table = wdbc_shaped();
    assert_eq!(table.matches(",M,").count(), 212);
    assert_eq!(table.matches(",B,").count(), 357);
    let case = Case::new().file("wdbc.csv", table).keys();
    // Without --out the spec goes to stdout.
    let d = case.clone().args(["init", "wdbc.csv"]).success();
    let spec = d.stdout.clone();
    assert!(spec.contains("id-column: \"id\""), "{spec}");
    assert!(spec.contains("column: \"diagnosis\""), "{spec}");
    assert!(spec.contains("anomaly: \"M\""), "{spec}");
    assert!(
        spec.contains("GUESSED: `diagnosis` is the label column"),
        "{spec}"
    );
    assert_eq!(features(&spec), 30, "{spec}");
    let case = case.file("spec.yaml", &spec);
    checks(&case);
    // From init to a signed card without editing the spec.
    let d = case.run_spec().success();
    assert!(d.read("out/card.html").contains("id=\"answer\""));
}

fn parquet_with_columns_to_leave_out(path: &std::path::Path) {
    let r = rows(400, 20, 5);
    let n = r.len();
    let col = |j: usize| r.iter().map(|x| x.1[j]).collect::<Vec<f64>>();
    let mut df = DataFrame::new(
        n,
        vec![
            Column::new("seq".into(), (0..n as i64).collect::<Vec<_>>()),
            // 1,764,892,800 s is 2025-12-05T00:00:00Z; one reading a minute.
            Column::new(
                "recorded".into(),
                (0..n as i64)
                    .map(|i| 1_764_892_800 + 60 * ((i * 37) % n as i64))
                    .collect::<Vec<_>>(),
            ),
            Column::new("line".into(), vec![3.0f64; n]),
            Column::new("a".into(), col(0)),
            Column::new("b".into(), col(1)),
            Column::new("c".into(), col(2)),
            Column::new(
                "operator".into(),
                (0..n).map(|i| format!("op{}", i % 7)).collect::<Vec<_>>(),
            ),
            Column::new(
                "outcome".into(),
                r.iter()
                    .map(|x| if x.2 { "anomaly" } else { "normal" })
                    .collect::<Vec<_>>(),
            ),
        ],
    )
    .unwrap();
    ParquetWriter::new(std::fs::File::create(path).unwrap())
        .finish(&mut df)
        .unwrap();
}

#[test]
fn a_parquet_file_gives_a_spec_that_checks_and_says_what_it_left_out() {
    let case = Case::new().file("specs/.keep", "");
    std::fs::create_dir_all(case.path("data")).unwrap();
    parquet_with_columns_to_leave_out(&case.path("data/readings.parquet"));
    let d = case
        .clone()
        .args(["init", "data/readings.parquet", "--out", "specs/spec.yaml"])
        .success();
    let spec = d.read("specs/spec.yaml");
    // The path is relative to the spec's own directory.
    assert!(
        spec.contains("path: \"../data/readings.parquet\""),
        "{spec}"
    );
    assert!(spec.contains("column: \"outcome\""), "{spec}");
    assert!(spec.contains("anomaly: \"anomaly\""), "{spec}");
    assert!(
        spec.contains("# left out: \"seq\": it counts up by one"),
        "{spec}"
    );
    assert!(
        spec.contains("# left out: \"recorded\": its values look like Unix times"),
        "{spec}"
    );
    assert!(
        spec.contains("# left out: \"line\": it is constant"),
        "{spec}"
    );
    assert!(
        spec.contains("# left out: \"operator\": text, not a number"),
        "{spec}"
    );
    assert_eq!(features(&spec), 3, "{spec}");
    case.clone().args(["check", "specs/spec.yaml"]).success();
}

#[test]
fn init_refuses_what_it_cannot_decide_and_never_overwrites() {
    // No column with two values.
    let case = Case::new().file("a.csv", "x,y,kind\n1,2,p\n2,3,q\n3,1,r\n");
    case.clone().args(["init", "a.csv"]).fails(
        2,
        &[
            "no column has exactly two distinct values",
            "--label COLUMN",
        ],
    );
    // A label but no numeric column.
    let case = Case::new().file("b.csv", "name,label\nx,ok\ny,bad\nz,ok\n");
    case.clone()
        .args(["init", "b.csv"])
        .fails(2, &["no column can be a feature", "numeric column"]);
    // Two equally common values: which is the anomaly?
    let case = Case::new().file("c.csv", "x,label\n1.5,u\n2.5,v\n");
    case.clone()
        .args(["init", "c.csv"])
        .fails(2, &["equally often", "--anomaly VALUE"]);
    // Given it, the spec is written.
    let d = case
        .clone()
        .args(["init", "c.csv", "--anomaly", "v"])
        .success();
    assert!(d.stdout.contains("anomaly: \"v\""), "{}", d.stdout);
    // A named label column that is not there.
    case.clone()
        .args(["init", "c.csv", "--label", "lable"])
        .fails(2, &["no column `lable`", "`label`"]);
    // An existing file is never overwritten.
    let case = Case::new()
        .file("d.csv", "x,label\n1.5,u\n2.5,v\n3.5,v\n")
        .file("spec.yaml", "mine\n");
    case.clone()
        .args(["init", "d.csv", "--out", "spec.yaml"])
        .fails(4, &["spec.yaml", "already exists", "never overwrites"]);
    assert_eq!(
        std::fs::read_to_string(case.path("spec.yaml")).unwrap(),
        "mine\n"
    );
    // Nothing is left behind by a refusal.
    case.clone()
        .args(["init", "missing.csv", "--out", "new.yaml"])
        .fails(4, &["missing.csv"]);
    assert!(!case.path("new.yaml").exists());
}
