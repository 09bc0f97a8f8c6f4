//! `data.stream: true`: the training rows are streamed into sufficient
//! statistics and never kept; the run must agree with the in-memory run on
//! everything but the last bits of the fitted parameters.

use crate::util::*;

/// Rows with a fixed split column: normals 60/20/20, anomalies half and half.
fn with_split(r: &Rows) -> String {
    let normals = r.iter().filter(|x| !x.2).count();
    let mut s = String::from("id,a,b,c,label,split\n");
    let (mut n, mut k) = (0, 0);
    for (id, x, a) in r {
        let split = if *a {
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
        };
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

#[test]
fn a_streamed_run_agrees_with_the_in_memory_run() {
    // More training rows than one block of sufficient statistics.
    let r = rows(120_000, 60, 61);
    let (m, s) = both(&r);
    let (a, b) = (m.json("mem/run.json"), s.json("str/run.json"));
    // The same rows in the same splits: identical manifests and counts.
    assert_eq!(a["split"]["manifest-blake3"], b["split"]["manifest-blake3"]);
    assert_eq!(a["split"]["counts"], b["split"]["counts"]);
    assert_eq!(a["split"]["counts"]["train"]["normal"], 72_000);
    assert_eq!(a["selection"]["chosen"], b["selection"]["chosen"]);
    for k in 0..2 {
        let (ca, cb) = (&a["candidates"][k], &b["candidates"][k]);
        let (pa, pb) = (&ca["params"]["mean"], &cb["params"]["mean"]);
        for j in 0..3 {
            let (x, y) = (pa[j].as_f64().unwrap(), pb[j].as_f64().unwrap());
            assert!((x - y).abs() <= 1e-12, "mean {j}: {x} vs {y}");
        }
        let (ta, tb) = (ca["tau"].as_f64().unwrap(), cb["tau"].as_f64().unwrap());
        assert!((ta - tb).abs() <= 1e-9 * ta.abs(), "τ {ta} vs {tb}");
        assert_eq!(ca["validation"]["confusion"], cb["validation"]["confusion"]);
        assert_eq!(ca["test"]["confusion"], cb["test"]["confusion"]);
    }
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
    // The card says what its feature figures show.
    assert!(s
        .read("str/card.md")
        .contains("validation normal rows (the training rows were streamed, not kept)"));
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
        let case = Case::new()
            .file("data.csv", text)
            .file("s.yaml", &spec)
            .keys()
            .env("ANOMARK_CHUNK_BYTES", "65536");
        case.args([
            "run",
            "s.yaml",
            "--key",
            "key.pem",
            "--out",
            "o",
            "--no-wall-clock",
            "--open-test",
        ])
        .success()
    };
    let (a, b) = (run(&plain), run(&quoted));
    assert_eq!(a.read("o/scores.csv"), b.read("o/scores.csv"));
    let (ja, jb) = (a.json("o/run.json"), b.json("o/run.json"));
    assert_eq!(ja["candidates"], jb["candidates"]);
    assert_eq!(ja["split"], jb["split"]);
    assert_ne!(ja["inputs"], jb["inputs"]);
}
