//! `data.stream: true`: the training rows are read in pieces and folded into
//! the training moments on content-hash buckets, the definition an in-memory
//! run uses too; the two runs must write the same bytes, apart from the
//! spec's own hash (the spec differs in `data.stream`, the reading mode).

use crate::util::*;

/// The split column's values for rows in order (`true`: an anomaly):
/// normals 60/20/20 by their order, anomalies alternating test and
/// validation.
fn split_values(anomalous: impl Iterator<Item = bool> + Clone) -> Vec<&'static str> {
    let normals = anomalous.clone().filter(|a| !a).count();
    let (mut n, mut k) = (0, 0);
    anomalous
        .map(|a| {
            if a {
                k += 1;
                if k % 2 == 0 {
                    "validation"
                } else {
                    "test"
                }
            } else {
                n += 1;
                if n * 10 <= normals * 6 {
                    "train"
                } else if n * 10 <= normals * 8 {
                    "validation"
                } else {
                    "test"
                }
            }
        })
        .collect()
}

/// Rows with a fixed split column ([`split_values`]).
fn with_split(r: &Rows) -> String {
    let mut s = String::from("id,a,b,c,label,split\n");
    for ((id, x, a), split) in r.iter().zip(split_values(r.iter().map(|x| x.2))) {
        s.push_str(&format!(
            "{id},{:.6},{:.6},{:.6},{},{split}\n",
            x[0],
            x[1],
            x[2],
            if *a { "anomaly" } else { "normal" }
        ));
    }
    s
}

fn both(r: &Rows) -> (Done, Done) {
    // Few bootstrap replicates: this test is about the fit, not the intervals.
    let base = spec(&["a", "b", "c"], "  from-column: split") + "bootstrap:\n  replicates: 20\n";
    let streamed = base.replace("  id-column: id\n", "  id-column: id\n  stream: true\n");
    let case = Case::new()
        .file("data.csv", with_split(r))
        .file("memory.yaml", &base)
        .file("stream.yaml", &streamed)
        .keys();
    let run = |spec: &str, out: &str| {
        case.clone()
            .args([
                "run",
                spec,
                "--key",
                "key.pem",
                "--out",
                out,
                "--no-wall-clock",
                "--open-test",
            ])
            .success()
    };
    (run("memory.yaml", "mem"), run("stream.yaml", "str"))
}

/// Runs `spec` (with `data.stream` off and on) in two folders beside the
/// files of `case` (with its keys), each spec as `spec.yaml` in its own folder, and checks
/// that both run directories hold the same files with the same bytes, apart
/// from spec.yaml itself (it differs in `data.stream`), the signed manifest
/// (which lists spec.yaml's hash) and the spec's blake3 where run.json and
/// the card record it.
fn same_bytes_in_memory_and_streamed(case: Case, spec: &str, env: &[(&str, &str)]) -> Done {
    let streamed = spec.replacen("data:\n", "data:\n  stream: true\n", 1);
    assert_ne!(streamed, spec);
    let mut case = case
        .file("mem/spec.yaml", spec)
        .file("str/spec.yaml", &streamed);
    for (k, v) in env {
        case = case.env(k, v);
    }
    let run = |dir: &str| {
        case.clone()
            .args([
                "run",
                &format!("{dir}/spec.yaml"),
                "--key",
                "key.pem",
                "--out",
                &format!("{dir}/out"),
                "--no-wall-clock",
                "--open-test",
            ])
            .success()
    };
    let (m, s) = (run("mem"), run("str"));
    let blake3 = |d: &Done, dir: &str| {
        d.json(&format!("{dir}/out/run.json"))["spec"]["blake3"]
            .as_str()
            .unwrap()
            .to_string()
    };
    let (bm, bs) = (blake3(&m, "mem"), blake3(&s, "str"));
    assert_ne!(bm, bs);
    let names = |dir: &str| {
        let mut v: Vec<String> = std::fs::read_dir(m.dir.join(dir))
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        v.sort();
        v
    };
    assert_eq!(names("mem/out"), names("str/out"));
    let mut compared = 0;
    for f in names("mem/out") {
        if ["spec.yaml", "manifest.json", "manifest.sig"].contains(&f.as_str()) {
            continue;
        }
        let a = m.read(&format!("mem/out/{f}")).replace(&bm, &bs);
        let b = s.read(&format!("str/out/{f}"));
        if a != b {
            let line = a.lines().zip(b.lines()).position(|(x, y)| x != y);
            let show = |t: &str| {
                line.and_then(|i| t.lines().nth(i))
                    .unwrap_or("")
                    .to_string()
            };
            panic!(
                "{f} differs between the in-memory and the streamed run (line {:?}):\n{}\n{}",
                line.map(|i| i + 1),
                show(&a),
                show(&b)
            );
        }
        compared += 1;
    }
    assert!(compared >= 8, "{compared} files compared");
    // The streamed run recomputes exactly, from the same bytes.
    case.clone()
        .args(["verify", "str/out", "--pubkey", "key.pub.pem", "--data"])
        .success();
    s
}

#[test]
fn a_streamed_run_writes_the_in_memory_runs_bytes() {
    // More training rows than one block of checks and than one 16-bit
    // bucket space (72,000 over 65,536 buckets), read in many small chunks,
    // with the training rows written aside in several spills.
    let r = rows(120_000, 60, 61);
    let base = spec(&["a", "b", "c"], "  from-column: split") + "bootstrap:\n  replicates: 20\n";
    let text = with_split(&r);
    let base = base.replace("path: data.csv", "path: ../data.csv");
    for (chunk, spill) in [("1048576", "100000"), ("65536", "1000000000")] {
        same_bytes_in_memory_and_streamed(
            Case::new().file("data.csv", &text).keys(),
            &base,
            &[
                ("ANOMARK_CHUNK_BYTES", chunk),
                ("ANOMARK_SPILL_BYTES", spill),
            ],
        );
    }
}

#[test]
fn a_streamed_run_writes_the_in_memory_runs_bytes_with_features_and_repeated_rows() {
    // Derived features and a transform, rows repeated (equal content hashes
    // in one bucket), a few rows only (most buckets hold one row).
    let r = rows(900, 24, 65);
    let base = spec(&["a", "b", "c"], "  from-column: split")
        .replace(
            "    - \"c\"\n",
            "    - \"c\"\n    - {ratio: [a, b]}\n    - {column: c, transform: [log1p]}\n",
        )
        .replace("path: data.csv", "path: ../data.csv")
        + "bootstrap:\n  replicates: 20\n";
    // log1p needs c > −1: shift the column.
    let mut text = with_split(&r);
    text = text
        .lines()
        .enumerate()
        .map(|(i, l)| {
            if i == 0 {
                return l.to_string();
            }
            let mut f: Vec<String> = l.split(',').map(str::to_string).collect();
            let c: f64 = f[3].parse().unwrap();
            f[3] = format!("{:.6}", c.abs() + 1.0);
            f.join(",")
        })
        .collect::<Vec<_>>()
        .join("\n")
        + "\n";
    // Sixty training rows repeated under other ids, at the end of the file.
    let copies: Vec<String> = text
        .lines()
        .filter(|l| l.ends_with(",train"))
        .step_by(7)
        .take(60)
        .enumerate()
        .map(|(i, l)| format!("dup{i}{}\n", &l[l.find(',').unwrap()..]))
        .collect();
    text.push_str(&copies.concat());
    let case = Case::new().file("data.csv", text).keys();
    same_bytes_in_memory_and_streamed(case, &base, &[("ANOMARK_SPILL_BYTES", "2000")]);
}

/// The demo pump-housing spec, made stream-able: its own card, features and
/// detectors, with the split given by a column (normals 60/20/20 and
/// anomalies half and half, by their order in the demo file).
#[test]
fn the_pump_housing_example_streams_to_the_same_bytes() {
    let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR"));
    let demo = std::fs::read_to_string(root.join("demo-data/pump-housings.csv")).unwrap();
    let mut lines = demo.lines();
    let header = lines.next().unwrap();
    let rows: Vec<&str> = lines.collect();
    let mut text = format!("{header},split\n");
    for (l, split) in rows
        .iter()
        .zip(split_values(rows.iter().map(|l| l.ends_with(",fail"))))
    {
        text.push_str(&format!("{l},{split}\n"));
    }
    let example =
        std::fs::read_to_string(root.join("specs-examples/pump-housing-leak-screen.yaml")).unwrap();
    let start = example.find("\nsplit:\n").unwrap();
    let end = example.find("\ndetectors:").unwrap();
    let spec = format!(
        "{}\nsplit:\n  from-column: split\n{}",
        &example[..start],
        &example[end..]
    )
    .replace("../demo-data/pump-housings.csv", "../pump-housings.csv")
    .lines()
    .filter(|l| !l.starts_with("output:") && !l.starts_with("ledger:"))
    .collect::<Vec<_>>()
    .join("\n")
        + "\nbootstrap:\n  replicates: 50\n";
    let case = Case::new().file("pump-housings.csv", text).keys();
    let s = same_bytes_in_memory_and_streamed(case, &spec, &[("ANOMARK_CHUNK_BYTES", "65536")]);
    assert!(s.read("str/out/card.md").contains("Pump housing"));
}

#[test]
fn a_streamed_run_is_byte_identical_when_repeated_and_verifies_by_recomputation() {
    let r = rows(3_000, 30, 62);
    let (_, s) = both(&r);
    let d = s.dir.clone();
    // Two validation runs (a final run would add a second ledger opening).
    let rerun = |out: &str| {
        let o = std::process::Command::new(BIN)
            .current_dir(&d)
            .args([
                "run",
                "stream.yaml",
                "--key",
                "key.pem",
                "--out",
                out,
                "--no-wall-clock",
            ])
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    };
    rerun("v1");
    rerun("v2");
    for f in ["run.json", "scores.csv", "card.html", "manifest.sig"] {
        let same = std::fs::read(d.join("v1").join(f)).unwrap()
            == std::fs::read(d.join("v2").join(f)).unwrap();
        assert!(same, "{f} differs between two streamed runs");
    }
    let v = std::process::Command::new(BIN)
        .current_dir(&d)
        .args(["verify", "str", "--pubkey", "key.pub.pem", "--data"])
        .output()
        .unwrap();
    assert!(v.status.success(), "{}", String::from_utf8_lossy(&v.stderr));
    // The feature figures show the training rows, sampled while streaming.
    assert!(s.read("str/card.md").contains("training rows"));
    assert!(!s.read("str/card.md").contains("streamed, not kept"));
}

#[test]
fn streaming_refuses_what_it_cannot_do_and_names_bad_rows() {
    let r = rows(2_000, 20, 63);
    let base = spec(&["a", "b", "c"], "  from-column: split")
        .replace("  id-column: id\n", "  id-column: id\n  stream: true\n");
    let case = Case::new()
        .file("data.csv", with_split(&r))
        .file(
            "knn.yaml",
            base.replace(
                "detectors: [independent-gaussian, multivariate-gaussian]",
                "detectors: [{knn-distance: {k: 3}}]",
            ),
        )
        .file(
            "protocol.yaml",
            spec(&["a", "b", "c"], PROTOCOL)
                .replace("  id-column: id\n", "  id-column: id\n  stream: true\n"),
        )
        .keys();
    let run = |spec: &str| {
        case.clone()
            .args(["run", spec, "--key", "key.pem", "--out", "o"])
    };
    run("knn.yaml").fails(
        2,
        &[
            "data.stream",
            "knn-distance",
            "needs its training rows in memory",
        ],
    );
    run("protocol.yaml").fails(2, &["data.stream", "from-column"]);
    // A training row with an unknown label, far into the file.
    let mut text = with_split(&r);
    text = text.replacen(",normal,train\n", ",nromal,train\n", 1);
    let bad = case.clone().file("data.csv", text).file("s.yaml", &base);
    bad.args(["run", "s.yaml", "--key", "key.pem", "--out", "o"])
        .fails(3, &["data.csv", "`label`", "line 2", "nromal"]);
}

/// A streamed CSV is read in chunks by the plain reader; a quoted field far
/// into the file makes it give up after many chunks, and polars reads the
/// file again from its first line. Both readings give the same fit, the same
/// scores and the same record (up to the input file's hash).
#[test]
fn a_streamed_run_falls_back_to_polars_after_many_chunks_with_the_same_result() {
    let r = rows(40_000, 40, 64);
    let plain = with_split(&r);
    // The same values with one id quoted, near the end: polars unquotes it.
    let k = plain.len() * 9 / 10;
    let k = k + plain[k..].find('\n').unwrap();
    let mut quoted = plain.clone();
    let end = k + 1 + quoted[k + 1..].find(',').unwrap();
    quoted.insert(end, '"');
    quoted.insert(k + 1, '"');
    assert_ne!(plain, quoted);
    let spec = spec(&["a", "b", "c"], "  from-column: split")
        .replace("  id-column: id\n", "  id-column: id\n  stream: true\n")
        + "bootstrap:\n  replicates: 20\n";
    let run = |text: &str| {
        // The training rows are written aside every 50,000 bytes, into a
        // temporary folder of the case's own, so that giving up the plain
        // reading also cuts files back, and the folder is seen removed.
        let case = Case::new()
            .file("data.csv", text)
            .file("s.yaml", &spec)
            .file("tmp/keep", "")
            .keys()
            .env("ANOMARK_CHUNK_BYTES", "65536")
            .env("ANOMARK_SPILL_BYTES", "50000");
        let tmp = case.path("tmp");
        let case = case.env("TMPDIR", tmp.to_str().unwrap());
        let done = case
            .args([
                "run",
                "s.yaml",
                "--key",
                "key.pem",
                "--out",
                "o",
                "--no-wall-clock",
                "--open-test",
            ])
            .success();
        let left: Vec<_> = std::fs::read_dir(&tmp).unwrap().collect();
        assert_eq!(left.len(), 1, "temporary files left behind");
        done
    };
    let (a, b) = (run(&plain), run(&quoted));
    assert_eq!(a.read("o/scores.csv"), b.read("o/scores.csv"));
    let (ja, jb) = (a.json("o/run.json"), b.json("o/run.json"));
    assert_eq!(ja["candidates"], jb["candidates"]);
    assert_eq!(ja["split"], jb["split"]);
    assert_ne!(ja["inputs"], jb["inputs"]);
}
