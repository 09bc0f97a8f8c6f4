//! Sources beyond one CSV: Parquet files, globs, directories as distributed
//! engines write them, and separate normal and anomaly sources; missing values.

use polars::prelude::*;

use crate::util::{csv, rows, spec, Case, Rows, PROTOCOL};

pub(crate) fn parquet(path: &std::path::Path, r: &[(String, Vec<f64>, bool)], int_c: bool) {
    let col = |j: usize| r.iter().map(|x| x.1[j]).collect::<Vec<f64>>();
    let c: Column = if int_c {
        Column::new(
            "c".into(),
            r.iter()
                .map(|x| (x.1[2] * 1000.0) as i64)
                .collect::<Vec<_>>(),
        )
    } else {
        Column::new("c".into(), col(2))
    };
    let mut df = DataFrame::new(
        r.len(),
        vec![
            Column::new(
                "id".into(),
                r.iter().map(|x| x.0.clone()).collect::<Vec<_>>(),
            ),
            Column::new("a".into(), col(0)),
            Column::new("b".into(), col(1)),
            c,
            Column::new(
                "label".into(),
                r.iter()
                    .map(|x| if x.2 { "anomaly" } else { "normal" })
                    .collect::<Vec<_>>(),
            ),
        ],
    )
    .unwrap();
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    ParquetWriter::new(std::fs::File::create(path).unwrap())
        .finish(&mut df)
        .unwrap();
}

fn chunks(r: &Rows, k: usize) -> Vec<Rows> {
    r.chunks(r.len().div_ceil(k)).map(|c| c.to_vec()).collect()
}

#[test]
fn a_directory_of_parquet_parts_reads_like_one_csv() {
    let r = rows(600, 12, 31);
    let from_csv = Case::new()
        .file("data.csv", csv(&["a", "b", "c"], &r))
        .file("spec.yaml", spec(&["a", "b", "c"], PROTOCOL))
        .keys()
        .run_spec()
        .success();
    let case = Case::new()
        .file(
            "spec.yaml",
            spec(&["a", "b", "c"], PROTOCOL).replace("path: data.csv", "path: parts"),
        )
        .file("parts/_SUCCESS", "")
        .keys();
    for (k, part) in chunks(&r, 3).iter().enumerate() {
        parquet(
            &case.path(&format!("parts/part-{k:05}.parquet")),
            part,
            false,
        );
    }
    let d = case.run_spec().success();
    let (a, b) = (from_csv.json("out/run.json"), d.json("out/run.json"));
    assert_eq!(a["split"], b["split"], "same contents, same split");
    assert_eq!(a["candidates"], b["candidates"]);
    let inputs = b["inputs"].as_array().unwrap();
    assert_eq!(inputs.len(), 3);
    assert_eq!(inputs[0]["path"], "parts/part-00000.parquet");
    assert_eq!(inputs[0]["format"], "parquet");
    let bytes = std::fs::read(d.dir.join("parts/part-00001.parquet")).unwrap();
    assert_eq!(inputs[1]["blake3"], blake3::hash(&bytes).to_hex().as_str());
}

#[test]
fn a_glob_selects_files_and_separate_sources_imply_labels() {
    let r = rows(400, 10, 32);
    let (normal, anomalous): (Rows, Rows) = r.iter().cloned().partition(|x| !x.2);
    let yaml = spec(&["a", "b", "c"], PROTOCOL).replace(
        "  path: data.csv\n  id-column: id\n  label:\n    column: label\n    normal: normal\n    anomaly: anomaly\n",
        "  normal-path: \"normal-*.parquet\"\n  anomaly-path: failed.csv\n  id-column: id\n",
    );
    let case = Case::new()
        .file("spec.yaml", yaml)
        .file(
            "failed.csv",
            csv(&["a", "b", "c"], &anomalous).replace(",anomaly\n", ",\n"),
        )
        .file("normal-old.txt", "not data")
        .keys();
    for (k, part) in chunks(&normal, 2).iter().enumerate() {
        parquet(&case.path(&format!("normal-{k}.parquet")), part, false);
    }
    let d = case.run_spec().success();
    let run = d.json("out/run.json");
    assert!(run["label"].is_null());
    assert_eq!(run["inputs"].as_array().unwrap().len(), 3);
    assert_eq!(run["split"]["counts"]["validation"]["anomaly"], 5);
    assert_eq!(run["split"]["counts"]["train"]["normal"], 240);
    assert!(d.read("out/card.md").contains("implied by the source"));
}

#[test]
fn a_column_whose_type_differs_between_files_is_refused() {
    let r = rows(300, 10, 33);
    let case = Case::new()
        .file(
            "spec.yaml",
            spec(&["a", "b", "c"], PROTOCOL).replace("path: data.csv", "path: \"p/*.parquet\""),
        )
        .keys();
    let parts = chunks(&r, 2);
    parquet(&case.path("p/a.parquet"), &parts[0], false);
    parquet(&case.path("p/b.parquet"), &parts[1], true);
    case.run_spec().fails(
        3,
        &["p/b.parquet", "column `c`", "`i64`", "`f64`", "p/a.parquet"],
    );
}

#[test]
fn a_glob_that_matches_nothing_names_the_field() {
    Case::new()
        .file(
            "spec.yaml",
            spec(&["a", "b", "c"], PROTOCOL).replace("path: data.csv", "path: \"none/*.parquet\""),
        )
        .keys()
        .run_spec()
        .fails(
            2,
            &["field `data.path`", "no file matches `none/*.parquet`"],
        );
}

fn with_missing(r: &Rows, at: &[usize]) -> String {
    let mut lines: Vec<String> = csv(&["a", "b", "c"], r)
        .lines()
        .map(str::to_string)
        .collect();
    for &i in at {
        let mut f: Vec<String> = lines[i + 1].split(',').map(str::to_string).collect();
        f[3] = String::new();
        lines[i + 1] = f.join(",");
    }
    lines.join("\n") + "\n"
}

#[test]
fn drop_row_leaves_out_missing_values_and_records_the_counts() {
    let r = rows(500, 12, 34);
    let yaml = spec(&["a", "b", "c"], PROTOCOL).replace(
        "  id-column: id\n",
        "  id-column: id\n  missing-values: drop-row\n",
    );
    let d = Case::new()
        .file("data.csv", with_missing(&r, &[3, 10, 502]))
        .file("spec.yaml", yaml)
        .keys()
        .run_spec()
        .success();
    let run = d.json("out/run.json");
    assert_eq!(run["dropped-rows"]["normal"], 2);
    assert_eq!(run["dropped-rows"]["anomaly"], 1);
    assert_eq!(run["missing-values"], "drop-row");
    let total: u64 = ["train", "validation", "test"]
        .iter()
        .map(|p| {
            let c = &run["split"]["counts"][p];
            c["normal"].as_u64().unwrap() + c["anomaly"].as_u64().unwrap()
        })
        .sum();
    assert_eq!(total, 512 - 3);
    assert!(d
        .read("out/card.md")
        .contains("2 normal and 1 anomalous rows were dropped"));
}

#[test]
fn missing_values_are_refused_by_default() {
    let r = rows(100, 6, 35);
    crate::util::standard(&r)
        .file("data.csv", with_missing(&r, &[3, 10]))
        .run_spec()
        .fails(3, &["column `c`", "missing", "lines 5, 12"]);
}

/// Issue 25: a folder with `part-0.parquet` and a link `self -> .` read the
/// same file 41 times. Each real file is read once and listed once, also
/// when a second link names the same file.
#[cfg(unix)]
#[test]
fn a_symlink_loop_in_a_data_folder_reads_each_file_once() {
    let r = rows(300, 12, 5);
    let case = Case::new()
        .file(
            "spec.yaml",
            spec(&["a", "b", "c"], PROTOCOL).replace("path: data.csv", "path: parts"),
        )
        .keys();
    parquet(&case.path("parts/part-0.parquet"), &r, false);
    std::os::unix::fs::symlink(".", case.path("parts/self")).unwrap();
    std::os::unix::fs::symlink("..", case.path("parts/up")).unwrap();
    std::os::unix::fs::symlink("part-0.parquet", case.path("parts/part-1.parquet")).unwrap();
    let d = case.run_spec().success();
    let run = d.json("out/run.json");
    let inputs = run["inputs"].as_array().unwrap();
    assert_eq!(inputs.len(), 1, "{inputs:?}");
    assert_eq!(inputs[0]["path"], "parts/part-0.parquet");
    let counts = &run["split"]["counts"];
    let total: u64 = ["train", "validation", "test"]
        .iter()
        .flat_map(|s| ["normal", "anomaly"].map(|c| counts[s][c].as_u64().unwrap_or(0)))
        .sum();
    assert_eq!(total, 312, "{counts}");
}

/// Issue 25: a Parquet file that names a column twice was refused by polars
/// as "cannot read as CSV: duplicate: column with name …", with no place.
/// It is refused naming the column and its positions, in `run`, `check`, the
/// streamed reader and `score`. polars will not write such a file, so one is
/// written with a stand-in name of the same length, `LABEL`, which is then
/// renamed in the footer's schema (the Thrift strings keep their length, so
/// the file stays well formed).
#[test]
fn a_parquet_file_that_repeats_a_column_name_is_refused_naming_it() {
    let r = rows(200, 8, 34);
    let labels: Vec<&str> = r
        .iter()
        .map(|x| if x.2 { "anomaly" } else { "normal" })
        .collect();
    let split: Vec<&str> = (0..r.len())
        .map(|i| ["train", "train", "validation", "test"][i % 4])
        .collect();
    let col = |j: usize| r.iter().map(|x| x.1[j]).collect::<Vec<f64>>();
    let mut df = DataFrame::new(
        r.len(),
        vec![
            Column::new(
                "id".into(),
                r.iter().map(|x| x.0.clone()).collect::<Vec<_>>(),
            ),
            Column::new("a".into(), col(0)),
            Column::new("b".into(), col(1)),
            Column::new("c".into(), col(2)),
            Column::new("label".into(), labels.clone()),
            Column::new("split".into(), split),
            // A second label column that disagrees with the first.
            Column::new(
                "LABEL".into(),
                labels.iter().rev().copied().collect::<Vec<_>>(),
            ),
        ],
    )
    .unwrap();
    let mut bytes = Vec::new();
    ParquetWriter::new(&mut bytes).finish(&mut df).unwrap();
    let mut renamed = 0;
    for i in 0..bytes.len().saturating_sub(4) {
        if &bytes[i..i + 5] == b"LABEL" {
            bytes[i..i + 5].copy_from_slice(b"label");
            renamed += 1;
        }
    }
    assert!(renamed >= 1, "the stand-in name is in the footer");

    let case = Case::new()
        .file("data.parquet", &bytes)
        .file(
            "spec.yaml",
            spec(&["a", "b", "c"], PROTOCOL).replace("path: data.csv", "path: data.parquet"),
        )
        .keys();
    let said = [
        "data.parquet",
        "column `label`",
        "2 times, at positions 5, 7",
    ];
    let d = case.clone().run_spec().fails(3, &said);
    assert!(!d.stderr.contains("as CSV"), "{}", d.stderr);
    let d = case.clone().args(["check", "spec.yaml"]).exec();
    let all = format!("{}{}", d.stdout, d.stderr);
    assert!(
        said.iter().all(|s| all.contains(s)) && !all.contains("problems: none"),
        "{all}"
    );
    let streamed = spec(&["a", "b", "c"], "  from-column: split")
        .replace("path: data.csv", "path: data.parquet")
        .replace("  id-column: id\n", "  id-column: id\n  stream: true\n");
    case.clone()
        .file("spec.yaml", streamed)
        .run_spec()
        .fails(3, &said);
    // `score` reads its input's schema the same way.
    let fine = crate::util::standard(&r).run_spec().success();
    Case::new()
        .file("new.parquet", &bytes)
        .args([
            "score",
            fine.dir.join("out").to_str().unwrap(),
            "new.parquet",
            "--out",
            "scored.csv",
        ])
        .fails(3, &["new.parquet", "column `label`", "positions 5, 7"]);
}
