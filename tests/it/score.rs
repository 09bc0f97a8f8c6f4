//! `anomark score`: new data scored with a recorded run gives the run's own
//! scores to the bit, in CSV and Parquet, on any number of threads, and bad
//! input is refused with the file, column and lines named.

use std::collections::BTreeMap;

use polars::prelude::*;

use crate::util::*;

/// The chosen candidate's score per id, from the run's scores.csv.
fn recorded_scores(d: &Done) -> (BTreeMap<String, f64>, f64) {
    let run = d.json("out/run.json");
    let chosen = run["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["chosen"] == true)
        .unwrap()
        .clone();
    let name = chosen["name"].as_str().unwrap().to_string();
    let text = d.read("out/scores.csv");
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let j = header.iter().position(|h| *h == name).unwrap();
    let map = lines
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            (f[0].to_string(), f[j].parse::<f64>().unwrap())
        })
        .collect();
    (map, chosen["tau"].as_f64().unwrap())
}

/// (id, score, flag, run tag) per row of a scored CSV.
fn scored_csv(d: &Done, name: &str) -> Vec<(String, f64, bool, String)> {
    let text = d.read(name);
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let at = |n: &str| header.iter().position(|h| *h == n).unwrap();
    let (s, f, r) = (at("anomark_score"), at("anomark_flag"), at("anomark_run"));
    lines
        .map(|l| {
            let v: Vec<&str> = l.split(',').collect();
            (
                v[0].to_string(),
                v[s].parse().unwrap(),
                v[f] == "true",
                v[r].to_string(),
            )
        })
        .collect()
}

fn score(case: &Case, data: &str, out: &str, extra: &[&str]) -> Case {
    let mut args = vec!["score", "out", data, "--out", out];
    args.extend_from_slice(extra);
    case.clone().args(args)
}

#[test]
fn scoring_the_runs_own_data_gives_its_recorded_scores_to_the_bit() {
    let r = rows(600, 24, 41);
    let case = standard(&r);
    let d = case.clone().run_spec().success();
    let (recorded, tau) = recorded_scores(&d);
    let s = score(
        &case,
        "data.csv",
        "scored.csv",
        &["--pubkey", "key.pub.pem"],
    )
    .success();
    assert!(s.stdout.contains("(signature verified)"), "{}", s.stdout);
    let rows_out = scored_csv(&s, "scored.csv");
    // Every input row, in input order.
    assert_eq!(rows_out.len(), r.len());
    for (out, input) in rows_out.iter().zip(&r) {
        assert_eq!(out.0, input.0);
    }
    let manifest = std::fs::read(d.dir.join("out/manifest.json")).unwrap();
    let tag = format!("blake3:{}", blake3::hash(&manifest).to_hex());
    let mut compared = 0;
    for (id, score, flag, run) in &rows_out {
        assert_eq!(run, &tag);
        assert_eq!(*flag, *score > tau, "{id}");
        if let Some(v) = recorded.get(id) {
            assert_eq!(v.to_bits(), score.to_bits(), "row {id}: {v} vs {score}");
            compared += 1;
        }
    }
    assert_eq!(compared, recorded.len());
    assert!(compared > 200);
    let json: serde_json::Value = serde_json::from_str(
        &score(&case, "data.csv", "again.csv", &["--json"])
            .success()
            .stdout,
    )
    .unwrap();
    assert_eq!(json["rows"], r.len());
    assert_eq!(
        json["run-manifest-blake3"],
        tag.trim_start_matches("blake3:")
    );
    let flagged = rows_out.iter().filter(|r| r.2).count();
    assert_eq!(json["flagged"], flagged);
}

#[test]
fn parquet_in_and_out_and_any_thread_count_give_the_same_scores() {
    let r = rows(500, 20, 42);
    let case = standard(&r);
    case.clone().run_spec().success();
    // The same rows as Parquet.
    let mut df = df!(
        "id" => r.iter().map(|x| x.0.clone()).collect::<Vec<_>>(),
        "a" => r.iter().map(|x| x.1[0]).collect::<Vec<_>>(),
        "b" => r.iter().map(|x| x.1[1]).collect::<Vec<_>>(),
        "c" => r.iter().map(|x| x.1[2]).collect::<Vec<_>>(),
    )
    .unwrap();
    let f = std::fs::File::create(case.path("new.parquet")).unwrap();
    ParquetWriter::new(f).finish(&mut df).unwrap();
    let one = score(&case, "data.csv", "one.csv", &[])
        .env("RAYON_NUM_THREADS", "1")
        .success();
    let many = score(&case, "data.csv", "many.csv", &[])
        .env("RAYON_NUM_THREADS", "4")
        .success();
    assert_eq!(one.read("one.csv"), many.read("many.csv"));
    score(&case, "new.parquet", "p.parquet", &[]).success();
    let back = ParquetReader::new(std::fs::File::open(case.path("p.parquet")).unwrap())
        .finish()
        .unwrap();
    let csv_scores: Vec<f64> = scored_csv(&one, "one.csv").iter().map(|r| r.1).collect();
    let pq: Vec<f64> = back
        .column("anomark_score")
        .unwrap()
        .f64()
        .unwrap()
        .into_no_null_iter()
        .collect();
    assert_eq!(pq.len(), r.len());
    for (a, b) in pq.iter().zip(&csv_scores) {
        assert_eq!(a.to_bits(), b.to_bits());
    }
    assert_eq!(
        back.column("anomark_flag").unwrap().dtype(),
        &DataType::Boolean
    );
}

#[test]
fn many_batches_keep_the_input_order() {
    // More rows than one streaming batch holds.
    let r = rows(150_000, 40, 43);
    let case = standard(&r);
    case.clone().run_spec().success();
    let s = score(&case, "data.csv", "s.csv", &["--quiet"]).success();
    assert_eq!(s.stderr, "");
    let out = scored_csv(&s, "s.csv");
    assert_eq!(out.len(), r.len());
    assert!(out.iter().zip(&r).all(|(o, i)| o.0 == i.0));
}

#[test]
fn k_nearest_neighbours_is_refitted_from_the_runs_inputs() {
    let r = rows(400, 20, 44);
    let case = Case::new()
        .file("data.csv", csv(&["a", "b", "c"], &r))
        .file(
            "spec.yaml",
            spec(&["a", "b", "c"], PROTOCOL).replace(
                "detectors: [independent-gaussian, multivariate-gaussian]",
                "detectors: [{knn-distance: {k: 3}}]",
            ),
        )
        .keys();
    let d = case.clone().run_spec().success();
    let (recorded, _) = recorded_scores(&d);
    let s = score(&case, "data.csv", "s.csv", &[]).success();
    for (id, score, _, _) in scored_csv(&s, "s.csv") {
        if let Some(v) = recorded.get(&id) {
            assert_eq!(v.to_bits(), score.to_bits(), "{id}");
        }
    }
    // Changed training data is refused: the refit would not be the run's model.
    std::fs::write(
        case.path("data.csv"),
        csv(&["a", "b", "c"], &rows(400, 20, 45)),
    )
    .unwrap();
    score(&case, "new.csv", "t.csv", &[]).fails(1, &["the inputs are not the recorded ones"]);
}

#[test]
fn a_changed_run_is_refused_with_and_without_a_key() {
    let case = standard(&rows(300, 16, 46));
    case.clone().run_spec().success();
    let p = case.path("out/run.json");
    let text = std::fs::read_to_string(&p).unwrap();
    let i = text.find("\"tau\": ").unwrap() + 7;
    let mut edited = text.clone();
    edited.replace_range(i..i + 1, if &text[i..i + 1] == "9" { "8" } else { "9" });
    std::fs::write(&p, edited).unwrap();
    score(&case, "data.csv", "a.csv", &["--pubkey", "key.pub.pem"]).fails(1, &["run.json"]);
    score(&case, "data.csv", "b.csv", &[])
        .fails(1, &["run.json is not the file manifest.json lists"]);
    assert!(!case.path("a.csv").exists() && !case.path("b.csv").exists());
}

#[test]
fn bad_new_data_is_refused_naming_file_column_and_lines() {
    let r = rows(300, 16, 47);
    let case = standard(&r)
        .file("nob.csv", "id,a,b_,c\nx1,0.1,0.2,0.3\n")
        .file("text.csv", "id,a,b,c\nx1,0.1,0.2,0.3\nx2,0.1,oops,0.3\n")
        .file(
            "gap.csv",
            "id,a,b,c\nx1,0.1,0.2,0.3\nx2,0.1,,0.3\nx3,1,2,3\n",
        );
    case.clone().run_spec().success();
    score(&case, "nob.csv", "o1.csv", &[]).fails(3, &["nob.csv", "`b`", "did you mean `b_`?"]);
    score(&case, "text.csv", "o2.csv", &[])
        .fails(3, &["text.csv", "`b`", "line 3", "not a number"]);
    score(&case, "gap.csv", "o3.csv", &[])
        .fails(3, &["gap.csv", "line 3", "a feature value is missing"]);
    // Nothing half-written: no output and no temporary file is left.
    let left: Vec<String> = std::fs::read_dir(case.dir.path())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| (n.starts_with('o') && n.ends_with(".csv")) || n.starts_with(".anomark"))
        .collect();
    assert_eq!(left, Vec::<String>::new());
    // An existing output is never overwritten.
    let case = case.file("taken.csv", "x");
    score(&case, "data.csv", "taken.csv", &[]).fails(4, &["already exists"]);
}

#[test]
fn a_value_outside_a_transforms_domain_names_feature_and_line() {
    let r: Rows = rows(300, 16, 48)
        .into_iter()
        .map(|(id, x, a)| (id, vec![x[0].abs() + 0.5, x[1], x[2]], a))
        .collect();
    let spec_text = spec(&["a", "b", "c"], PROTOCOL).replace(
        "  features:\n    - \"a\"\n",
        "  features:\n    - {column: a, transform: log, name: a}\n",
    );
    let case = Case::new()
        .file("data.csv", csv(&["a", "b", "c"], &r))
        .file("spec.yaml", spec_text)
        .file(
            "neg.csv",
            "id,a,b,c\nx1,1.0,0.2,0.3\nx2,2.0,0.2,0.3\nx3,-1.0,0.2,0.3\n",
        )
        .keys();
    case.clone().run_spec().success();
    score(&case, "neg.csv", "o.csv", &[]).fails(3, &["neg.csv", "`a`", "line 4", "`log`"]);
}
