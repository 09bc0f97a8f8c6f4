//! One test per kind of bad input: each gives a clear message naming the
//! file and the field, column or rows, a non-zero exit, and no output.

use crate::util::{csv, rows, spec, standard, Case, PROTOCOL};

fn no_output(d: &crate::util::Done) {
    assert!(!d.dir.join("out").exists(), "a failed run left output");
    let leftovers: Vec<_> = std::fs::read_dir(&d.dir)
        .unwrap()
        .filter_map(|e| e.ok())
        .filter(|e| {
            e.file_name()
                .to_string_lossy()
                .starts_with(".anomark-partial")
        })
        .collect();
    assert!(leftovers.is_empty(), "temporary directory left behind");
}

#[test]
fn malformed_yaml_names_file_line_and_column() {
    let bad = spec(&["a", "b", "c"], PROTOCOL).replace("  label:\n", "  label: [\n");
    let d = standard(&rows(50, 4, 1))
        .file("spec.yaml", bad)
        .run_spec()
        .fails(2, &["spec.yaml:"]);
    // The caret rendering shows the offending line.
    assert!(d.stderr.contains(" | "), "{}", d.stderr);
    no_output(&d);
}

#[test]
fn unknown_key_is_refused_with_its_place() {
    let bad = spec(&["a", "b", "c"], PROTOCOL)
        .replace("  owner: Tests\n", "  owner: Tests\n  colour: red\n");
    let d = standard(&rows(50, 4, 1))
        .file("spec.yaml", bad)
        .run_spec()
        .fails(
            2,
            &[
                "spec.yaml:21:",
                "field `card.colour`",
                "unknown field `colour`",
            ],
        );
    no_output(&d);
}

#[test]
fn wrong_type_names_the_field() {
    let bad = spec(&["a", "b", "c"], PROTOCOL).replace("seed: 7", "seed: many");
    standard(&rows(50, 4, 1))
        .file("spec.yaml", bad)
        .run_spec()
        .fails(
            2,
            &[
                "spec.yaml:15:",
                "field `split.protocol.seed`",
                "expected a whole number ≥ 0, found `many`",
            ],
        );
}

#[test]
fn missing_column_names_the_spec_line_and_the_file() {
    let d = standard(&rows(50, 4, 1))
        .file("spec.yaml", spec(&["a", "b", "thickness"], PROTOCOL))
        .run_spec()
        .fails(
            2,
            &[
                "spec.yaml:12:",
                "field `data.features[2]`",
                "column `thickness` is not in",
                "data.csv",
                "`a`",
            ],
        );
    no_output(&d);
}

#[test]
fn non_numeric_value_names_column_and_lines() {
    let mut text = csv(&["a", "b", "c"], &rows(50, 4, 1));
    text = text
        .lines()
        .enumerate()
        .map(|(i, l)| {
            if i == 7 || i == 9 {
                let mut f: Vec<&str> = l.split(',').collect();
                f[2] = "n/a";
                f.join(",")
            } else {
                l.to_string()
            }
        })
        .collect::<Vec<_>>()
        .join("\n");
    let d = standard(&rows(50, 4, 1))
        .file("data.csv", text + "\n")
        .run_spec()
        .fails(
            3,
            &[
                "data.csv",
                "column `b`",
                "value `n/a` is not a number",
                "lines 8, 10",
            ],
        );
    no_output(&d);
}

#[test]
fn missing_value_names_column_and_line() {
    let text = csv(&["a", "b", "c"], &rows(50, 4, 1));
    let text: String = text
        .lines()
        .enumerate()
        .map(|(i, l)| {
            if i == 5 {
                let mut f: Vec<&str> = l.split(',').collect();
                f[3] = "";
                f.join(",") + "\n"
            } else {
                format!("{l}\n")
            }
        })
        .collect();
    standard(&rows(50, 4, 1))
        .file("data.csv", text)
        .run_spec()
        .fails(3, &["column `c`", "missing", "line 6"]);
}

#[test]
fn undeclared_label_value_names_the_rows() {
    let text = csv(&["a", "b", "c"], &rows(50, 4, 1)).replacen(",normal\n", ",Normal\n", 2);
    standard(&rows(50, 4, 1))
        .file("data.csv", text)
        .run_spec()
        .fails(
            3,
            &[
                "column `label`",
                "label `Normal` is neither",
                "`normal`",
                "`anomaly`",
                "lines 2, 3",
            ],
        );
}

#[test]
fn too_few_anomalies_is_refused() {
    let d = standard(&rows(100, 1, 1)).run_spec().fails(
        3,
        &["split holds", "0 anomalous rows", "at least one of both"],
    );
    no_output(&d);
}

#[test]
fn zero_variance_feature_is_named() {
    let r = crate::util::with_constant_c(rows(100, 4, 1));
    standard(&r).run_spec().fails(3, &["zero variance", "`c`"]);
}

#[test]
fn singular_covariance_names_the_features() {
    // c = a + b for every row: only the multivariate Gaussian refuses.
    let r: crate::util::Rows = rows(100, 4, 1)
        .into_iter()
        .map(|(id, mut x, a)| {
            x[2] = x[0] + x[1];
            (id, x, a)
        })
        .collect();
    let text = csv(&["a", "b", "c"], &r);
    standard(&r).file("data.csv", text).run_spec().fails(
        3,
        &["multivariate-gaussian", "singular", "`a`", "`b`", "`c`"],
    );
}

#[test]
fn existing_output_directory_is_never_overwritten() {
    let case = standard(&rows(60, 4, 1)).file("out/keep.txt", "mine");
    case.clone()
        .run_spec()
        .fails(4, &["`out`", "already exists"]);
    assert_eq!(
        std::fs::read_to_string(case.path("out/keep.txt")).unwrap(),
        "mine"
    );
}

#[test]
fn a_failure_at_the_last_moment_leaves_nothing() {
    let d = standard(&rows(60, 4, 1))
        .env("ANOMARK_FAIL_AT", "before-rename")
        .run_spec()
        .fails(70, &["injected failure", "bug"]);
    no_output(&d);
}

#[test]
fn missing_data_file_is_named() {
    standard(&rows(60, 4, 1))
        .file(
            "spec.yaml",
            spec(&["a", "b", "c"], PROTOCOL).replace("data.csv", "nowhere.csv"),
        )
        .run_spec()
        .fails(4, &["nowhere.csv"]);
}

#[test]
fn bad_private_key_is_refused() {
    let case = standard(&rows(60, 4, 1)).file("bad.pem", "not a key\n");
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(case.path("bad.pem"), std::fs::Permissions::from_mode(0o600))
            .unwrap();
    }
    case.args(["run", "spec.yaml", "--key", "bad.pem", "--out", "out"])
        .fails(4, &["key `bad.pem`", "PKCS#8"]);
}

#[cfg(unix)]
#[test]
fn private_key_readable_by_others_is_refused() {
    use std::os::unix::fs::PermissionsExt;
    let case = standard(&rows(60, 4, 1));
    std::fs::set_permissions(case.path("key.pem"), std::fs::Permissions::from_mode(0o644)).unwrap();
    case.run_spec()
        .fails(4, &["readable by others", "chmod 600"]);
}

#[test]
fn missing_spec_is_an_io_error() {
    Case::new()
        .keys()
        .args(["run", "absent.yaml", "--key", "key.pem", "--out", "out"])
        .fails(4, &["absent.yaml"]);
}

/// Issue 25: a training value of 1e308 made the variance infinite and every
/// score NaN, and the run blamed a validation row; `check` printed `sd inf`
/// and "problems: none". The value's own line is named, in `run` and `check`.
#[test]
fn a_huge_training_value_is_refused_naming_its_line() {
    let r = rows(40, 6, 3);
    let mut text = String::from("id,a,b,c,split,label\n");
    for (i, (id, x, anomalous)) in r.iter().enumerate() {
        let split = match (anomalous, i % 4) {
            (true, k) if k % 2 == 0 => "validation",
            (true, _) => "test",
            (false, 0) => "validation",
            (false, 1) => "test",
            _ => "train",
        };
        // Row 6 (line 8) is a training row.
        let a = if i == 6 {
            "1e308".to_string()
        } else {
            format!("{:.6}", x[0])
        };
        let label = if *anomalous { "anomaly" } else { "normal" };
        text.push_str(&format!(
            "{id},{a},{:.6},{:.6},{split},{label}\n",
            x[1], x[2]
        ));
    }
    let case = Case::new()
        .file("data.csv", text)
        .file("spec.yaml", spec(&["a", "b", "c"], "  from-column: split"))
        .keys();
    let d = case.clone().run_spec().exec();
    assert_eq!(d.code, 3, "{}", d.stderr);
    assert!(
        d.stderr.contains("beyond ±1e150") && d.stderr.contains("line 8"),
        "{}",
        d.stderr
    );
    no_output(&d);
    let d = case.clone().args(["check", "spec.yaml"]).exec();
    assert!(d.stdout.contains("beyond ±1e150"), "{}", d.stdout);
    assert!(!d.stdout.contains("problems: none"), "{}", d.stdout);
    // `standardise` takes moments of its own before the detector does; they
    // overflowed too, and the run blamed a zero variance on no row.
    let standardised = spec(&["a", "b", "c"], "  from-column: split").replace(
        "    - \"a\"\n",
        "    - {column: a, transform: [standardise]}\n",
    );
    case.clone()
        .file("spec.yaml", standardised)
        .run_spec()
        .fails(3, &["column `standardise(a)`", "beyond ±1e150", "line 8"]);
    // The streamed fit (moments folded block by block) has its own check.
    let streamed = spec(&["a", "b", "c"], "  from-column: split")
        .replace("  id-column: id\n", "  id-column: id\n  stream: true\n");
    let d = case
        .file("spec.yaml", streamed)
        .run_spec()
        .fails(3, &["data.csv", "column `a`", "beyond ±1e150", "line 8"]);
    no_output(&d);
}

/// Issue 25: `bootstrap.replicates: 1000000000` was accepted and never
/// finished. Every knob whose cost grows with it has an upper bound,
/// refused at the spec with its place.
#[test]
fn cost_knobs_beyond_their_bound_are_refused_at_the_spec() {
    let base = spec(&["a", "b", "c"], PROTOCOL);
    let cases = [
        (
            format!("{base}bootstrap: {{replicates: 1000000000}}\n"),
            "field `bootstrap.replicates`: `replicates` must be at most 100000, found 1000000000",
        ),
        (
            base.replace(
                "detectors: [independent-gaussian, multivariate-gaussian]",
                "detectors: [{knn-distance: {k: 5000}}]",
            ),
            "`k` must be at most 1000, found 5000",
        ),
        (
            base.replace(
                "detectors: [independent-gaussian, multivariate-gaussian]",
                "detectors: [{gaussian-mixture: {k-max: 21}}]",
            ),
            "≤ `k-max` ≤ 20",
        ),
        (
            spec(&["a"; 1001], PROTOCOL),
            "1001 features; at most 1000 are allowed in one set",
        ),
        (
            base.replace(
                "  features:\n    - \"a\"\n    - \"b\"\n    - \"c\"\n",
                &(0..101)
                    .map(|i| format!("    - name: s{i}\n      features: [a]\n"))
                    .fold("  feature-sets:\n".to_string(), |acc, s| acc + &s),
            ),
            "101 feature sets; at most 100 are allowed",
        ),
    ];
    for (text, message) in cases {
        let d = standard(&rows(50, 4, 1))
            .file("spec.yaml", text)
            .run_spec()
            .fails(2, &["spec.yaml:", message]);
        no_output(&d);
    }
}

/// Issue 25: a header `id,a,b,a,label` was fitted on the first `a`, two
/// disagreeing `label` columns were accepted, and `check` said "problems:
/// none". A repeated name the spec uses is refused, naming its positions, in
/// `run`, `check` and the streamed reader.
#[test]
fn a_repeated_column_name_the_spec_uses_is_refused() {
    let r = rows(50, 4, 1);
    let plain = csv(&["a", "b", "c"], &r);
    let twice_a = plain.replacen("id,a,b,c,label", "id,a,b,c,a,label", 1);
    let twice_a: String = twice_a
        .lines()
        .enumerate()
        .map(|(i, l)| {
            if i == 0 {
                format!("{l}\n")
            } else {
                // The second `a` disagrees with the first.
                let (head, label) = l.rsplit_once(',').unwrap();
                format!("{head},{}.5,{label}\n", i % 7)
            }
        })
        .collect();
    let twice_label = plain
        .lines()
        .enumerate()
        .map(|(i, l)| match i {
            0 => format!("{l},label\n"),
            _ => format!("{l},normal\n"),
        })
        .collect::<String>();
    for (text, column, at) in [
        (twice_a, "column `a`", "2 times, at positions 2, 5"),
        (twice_label, "column `label`", "2 times, at positions 5, 6"),
    ] {
        let case = standard(&r).file("data.csv", text);
        let d = case
            .clone()
            .run_spec()
            .fails(3, &["data.csv", column, at, "line 1"]);
        no_output(&d);
        let d = case.clone().args(["check", "spec.yaml"]).exec();
        let all = format!("{}{}", d.stdout, d.stderr);
        assert!(all.contains(at) && !all.contains("problems: none"), "{all}");
        // The streamed reader (from-column split) has its own header path.
        let streamed = spec(&["a", "b", "c"], "  from-column: split")
            .replace("  id-column: id\n", "  id-column: id\n  stream: true\n");
        let with_split: String = case_text(&case)
            .lines()
            .enumerate()
            .map(|(i, l)| match i {
                0 => format!("{l},split\n"),
                _ => format!("{l},{}\n", ["train", "train", "validation", "test"][i % 4]),
            })
            .collect();
        case.file("spec.yaml", streamed)
            .file("data.csv", with_split)
            .run_spec()
            .fails(3, &["data.csv", column, at]);
    }
}

fn case_text(c: &Case) -> String {
    std::fs::read_to_string(c.path("data.csv")).unwrap()
}
