//! A Ballista cluster of anomark processes on 127.0.0.1 (the `cluster`
//! feature): a scheduler and two executors started as separate processes of
//! the `anomark` binary, anomark's engine steps run on it and compared with
//! the same steps in one process (whose equality with the in-process run,
//! bit for bit, `engine::tests` shows); processes of another version or
//! without anomark's functions refused by name. Every process is stopped by
//! the test, whatever happens.

use std::net::TcpListener;
use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::sync::Arc;
use std::time::{Duration, Instant};

use anomark::engine::{self, cluster, functions};
use anomark::spec::{Fractions, Seed};
use datafusion::arrow::array::{ArrayRef, Float64Array, StringArray};
use datafusion::arrow::datatypes::{DataType, Field, Schema};
use datafusion::arrow::record_batch::RecordBatch;
use datafusion::parquet::arrow::ArrowWriter;
use datafusion::prelude::{ParquetReadOptions, SessionContext};

use crate::util::BIN;

/// The processes of one cluster, killed and waited for when dropped.
pub(crate) struct Processes(pub(crate) Vec<Child>);

impl Drop for Processes {
    fn drop(&mut self) {
        for c in &mut self.0 {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

/// A port `p` such that `p` and `p + 1` are free now (an executor takes both).
fn free_ports() -> u16 {
    loop {
        let a = TcpListener::bind("127.0.0.1:0").unwrap();
        let p = a.local_addr().unwrap().port();
        if p < u16::MAX && TcpListener::bind(("127.0.0.1", p + 1)).is_ok() {
            return p;
        }
    }
}

fn spawn(args: &[String], log: &Path) -> Child {
    Command::new(BIN)
        .args(args)
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(std::fs::File::create(log).unwrap())
        .spawn()
        .unwrap()
}

/// Starts a scheduler and one executor per entry of `executors` (extra
/// arguments each), returning the processes and the scheduler's address.
pub(crate) fn start(dir: &Path, scheduler: &[&str], executors: &[&[&str]]) -> (Processes, String) {
    let port = free_ports();
    let addr = format!("127.0.0.1:{port}");
    let mut args: Vec<String> = ["cluster", "scheduler", "--bind", &addr]
        .iter()
        .map(|s| s.to_string())
        .collect();
    args.extend(scheduler.iter().map(|s| s.to_string()));
    let mut procs = Processes(vec![spawn(&args, &dir.join("scheduler.log"))]);
    for (i, extra) in executors.iter().enumerate() {
        let work = dir.join(format!("work{i}"));
        std::fs::create_dir_all(&work).unwrap();
        let mut args: Vec<String> = vec![
            "cluster".into(),
            "executor".into(),
            "--scheduler".into(),
            addr.clone(),
            "--bind".into(),
            format!("127.0.0.1:{}", free_ports()),
            "--work-dir".into(),
            work.to_string_lossy().into_owned(),
            "--memory-limit".into(),
            "256MiB".into(),
        ];
        args.extend(extra.iter().map(|s| s.to_string()));
        procs
            .0
            .push(spawn(&args, &dir.join(format!("executor{i}.log"))));
    }
    (procs, format!("df://{addr}"))
}

pub(crate) fn runtime() -> tokio::runtime::Runtime {
    anomark::engine::cluster::runtime().unwrap()
}

/// Connects once the scheduler answers and `executors` executors have
/// registered (a query needs them), or returns the last error after 60 s.
async fn connect(url: &str) -> anomark::Result<SessionContext> {
    connect_with(url, &cluster::ConnectOptions::new(4)).await
}

/// [`connect`] with the session's options.
pub(crate) async fn connect_with(
    url: &str,
    opts: &cluster::ConnectOptions,
) -> anomark::Result<SessionContext> {
    let start = Instant::now();
    loop {
        match cluster::connect(url, opts).await {
            Ok(ctx) => return Ok(ctx),
            Err(e) if start.elapsed() > Duration::from_secs(60) => return Err(e),
            Err(e) if e.to_string().contains("version mismatch") => return Err(e),
            Err(e) if e.to_string().contains("anomark's functions") => return Err(e),
            Err(_) => tokio::time::sleep(Duration::from_millis(250)).await,
        }
    }
}

const D: usize = 3;

/// Four Parquet parts of generated rows (label text, three features),
/// with identical rows and every seventh row an anomaly.
pub(crate) fn write_parts(dir: &Path, rows_per_part: usize) {
    std::fs::create_dir_all(dir).unwrap();
    let mut fields = vec![Field::new("label", DataType::Utf8, false)];
    fields.extend((0..D).map(|j| Field::new(format!("x{j}"), DataType::Float64, false)));
    let schema = Arc::new(Schema::new(fields));
    let mut state = 0x2545_F491_4F6C_DD1Du64;
    for part in 0..4 {
        let mut label = Vec::new();
        let mut cols = vec![Vec::new(); D];
        for i in 0..rows_per_part {
            let anomaly = (part * rows_per_part + i) % 7 == 3;
            label.push(if anomaly { "fault" } else { "ok" });
            for (j, c) in cols.iter_mut().enumerate() {
                state ^= state << 13;
                state ^= state >> 7;
                state ^= state << 17;
                let v = (state % 40) as f64 * 0.25 + j as f64;
                c.push(if anomaly { v + 20.0 } else { v });
            }
        }
        let mut arrays: Vec<ArrayRef> = vec![Arc::new(StringArray::from(label))];
        arrays.extend(
            cols.into_iter()
                .map(|c| Arc::new(Float64Array::from(c)) as ArrayRef),
        );
        let batch = RecordBatch::try_new(schema.clone(), arrays).unwrap();
        let file = std::fs::File::create(dir.join(format!("part-{part}.parquet"))).unwrap();
        let mut w = ArrowWriter::try_new(file, schema.clone(), None).unwrap();
        w.write(&batch).unwrap();
        w.close().unwrap();
    }
}

/// What the engine steps give: split cuts, counts, leakage, training
/// moments' bits, manifests and the validation summary's bytes.
#[derive(Debug, PartialEq)]
pub(crate) struct Outcome {
    cuts: Vec<u8>,
    counts: String,
    leaks: bool,
    moments: Vec<u64>,
    manifests: Vec<String>,
    summary: String,
}

pub(crate) async fn steps(ctx: &SessionContext, parts: &Path) -> anomark::Result<Outcome> {
    let e = |e: datafusion::error::DataFusionError| engine::engine_error("test", e);
    ctx.register_parquet(
        "data",
        &format!("{}/", parts.display()),
        ParquetReadOptions::default(),
    )
    .await
    .map_err(e)?;
    let names: Vec<String> = (0..D).map(|j| format!("x{j}")).collect();
    engine::hashed_view(ctx, "hashed", "data", "label = 'fault'", &names).await?;
    let fractions = Fractions {
        normal: [0.6, 0.2, 0.2],
        anomaly: [0.5, 0.5],
    };
    let cuts = engine::split_cuts(ctx, "hashed", Seed(7), &fractions).await?;
    let cut_lit = engine::sql_bytes(&cuts.to_bytes());
    engine::collect(
        ctx,
        "test",
        &format!(
            "CREATE VIEW assigned AS SELECT *, {}({cut_lit}, h, a) AS part FROM hashed",
            functions::SPLIT
        ),
    )
    .await?;
    let moments = engine::moments(ctx, "assigned", 0, &names).await?;
    let mut manifests = Vec::new();
    for p in 0..3 {
        manifests.push(engine::manifest(ctx, "assigned", p).await?);
    }
    let model = functions::ModelParams::Multivariate {
        mean: moments.mean.clone(),
        covariance: moments.covariance(),
    };
    engine::collect(
        ctx,
        "test",
        &format!(
            "CREATE VIEW scored AS SELECT *, {}({}, x0, x1, x2) AS s FROM assigned",
            functions::SCORE,
            engine::sql_bytes(&model.to_bytes())
        ),
    )
    .await?;
    let summary = engine::summary(ctx, "scored", "s", 1, &[])
        .await?
        .expect("no score is NaN");
    Ok(Outcome {
        cuts: cuts.to_bytes(),
        counts: {
            let c = engine::split_check(ctx, "assigned").await?;
            format!("{:?} {} {}", c.counts, c.rows_with_duplicates, c.leaked)
        },
        leaks: engine::leakage(ctx, "assigned").await?.is_some(),
        moments: moments
            .mean
            .iter()
            .chain(&moments.m2)
            .map(|v| v.to_bits())
            .collect(),
        manifests,
        summary: format!("{summary:?}"),
    })
}

#[test]
fn the_engine_steps_on_a_cluster_equal_one_process() {
    let dir = tempfile::tempdir().unwrap();
    let parts = dir.path().join("parts");
    write_parts(&parts, 2_000);
    let rt = runtime();
    let local = rt.block_on(async {
        let ctx = engine::local_context(1, 8192).unwrap();
        steps(&ctx, &parts).await.unwrap()
    });
    assert!(!local.leaks);
    let (procs, url) = start(dir.path(), &[], &[&[], &[]]);
    let remote = rt.block_on(async {
        let ctx = connect(&url).await?;
        steps(&ctx, &parts).await
    });
    drop(procs);
    assert_eq!(remote.unwrap(), local);
}

#[test]
fn processes_of_another_version_or_without_functions_are_refused_by_name() {
    let dir = tempfile::tempdir().unwrap();
    let rt = runtime();
    let own = engine::version();
    for (scheduler, executor, words) in [
        (
            &["--report-version", "0.0.0-other"][..],
            &[][..],
            "the planner (scheduler) runs anomark 0.0.0-other".to_string(),
        ),
        (
            &[][..],
            &["--report-version", "0.0.0-other"][..],
            "an executor runs anomark 0.0.0-other".to_string(),
        ),
        (
            &[][..],
            &["--without-functions"][..],
            "anomark's functions".to_string(),
        ),
    ] {
        let (procs, url) = start(dir.path(), scheduler, &[executor]);
        let got = rt.block_on(connect(&url));
        drop(procs);
        let e = got.err().expect("refused");
        let text = e.to_string();
        assert!(text.contains(&words), "{text}");
        if words.contains("runs anomark") {
            assert!(text.contains(&format!("the client {own}")), "{text}");
        }
        assert_eq!(e.code(), 5, "{text}");
    }
}

/// The pump-housing example on Parquet parts: the demo CSV's rows written
/// as `files` Parquet parts (id and label as text, the readings as numbers),
/// and the example spec reading the directory, with 50 bootstrap
/// replicates (to keep the test short) and no output or ledger of its own.
/// Returns the rows written to each part, in part order.
fn pump_housing_on_parts(dir: &Path, files: usize) -> Vec<usize> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let demo = std::fs::read_to_string(root.join("demo-data/pump-housings.csv")).unwrap();
    let mut lines = demo.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let rows: Vec<Vec<&str>> = lines.map(|l| l.split(',').collect()).collect();
    let text = |c: usize| c == 0 || c == header.len() - 1;
    let schema = Arc::new(Schema::new(
        header
            .iter()
            .enumerate()
            .map(|(c, h)| {
                let t = if text(c) {
                    DataType::Utf8
                } else {
                    DataType::Float64
                };
                Field::new(*h, t, false)
            })
            .collect::<Vec<_>>(),
    ));
    let parts = dir.join("parts");
    std::fs::create_dir_all(&parts).unwrap();
    let mut written = Vec::new();
    for (p, chunk) in rows.chunks(rows.len().div_ceil(files)).enumerate() {
        written.push(chunk.len());
        let arrays: Vec<ArrayRef> = (0..header.len())
            .map(|c| -> ArrayRef {
                if text(c) {
                    Arc::new(StringArray::from(
                        chunk.iter().map(|r| r[c]).collect::<Vec<_>>(),
                    ))
                } else {
                    Arc::new(Float64Array::from(
                        chunk
                            .iter()
                            .map(|r| r[c].parse::<f64>().unwrap())
                            .collect::<Vec<_>>(),
                    ))
                }
            })
            .collect();
        let batch = RecordBatch::try_new(schema.clone(), arrays).unwrap();
        let file = std::fs::File::create(parts.join(format!("part-{p}.parquet"))).unwrap();
        let mut w = ArrowWriter::try_new(file, schema.clone(), None).unwrap();
        w.write(&batch).unwrap();
        w.close().unwrap();
    }
    write_example_spec(dir, "parts");
    written
}

/// The pump-housing example's spec written to `dir/spec.yaml`, reading
/// `data` (relative to `dir`), with 50 bootstrap replicates and no output
/// or ledger of its own.
fn write_example_spec(dir: &Path, data: &str) {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let example =
        std::fs::read_to_string(root.join("specs-examples/pump-housing-leak-screen.yaml")).unwrap();
    let spec = example
        .replace("../demo-data/pump-housings.csv", data)
        .lines()
        .filter(|l| !l.starts_with("output:") && !l.starts_with("ledger:"))
        .collect::<Vec<_>>()
        .join("\n")
        + "\nbootstrap:\n  replicates: 50\n";
    std::fs::write(dir.join("spec.yaml"), spec).unwrap();
}

/// The example's spec in `dir` with a second feature set of features
/// without fitted parameters: a ratio, a difference and a product, and
/// `log`, `sqrt` and `log1p` on them and on a column.
fn with_derived_features(dir: &Path) {
    let path = dir.join("spec.yaml");
    let spec = std::fs::read_to_string(&path).unwrap();
    let plain = "  features:\n    - shot_pressure_mpa\n    - die_temp_c\n    - fill_time_ms\n    \
                 - cooling_time_s\n    - vacuum_mbar\n    - wall_thickness_mm\n";
    assert!(spec.contains(plain), "{spec}");
    let sets = "  feature-sets:\n    - name: readings\n      features: [shot_pressure_mpa, \
                die_temp_c, fill_time_ms, cooling_time_s, vacuum_mbar, wall_thickness_mm]\n    \
                - name: derived\n      features:\n        - shot_pressure_mpa\n        \
                - {ratio: [fill_time_ms, die_temp_c], name: fill_per_degree, transform: log}\n        \
                - {difference: [die_temp_c, shot_pressure_mpa], name: temp_less_pressure}\n        \
                - {product: [cooling_time_s, wall_thickness_mm], name: cooling_by_wall, \
                transform: [sqrt, log1p]}\n        \
                - {column: vacuum_mbar, transform: log}\n";
    std::fs::write(&path, spec.replace(plain, sets)).unwrap();
}

/// One scored row: id, split, label, each candidate's score's bits.
type ScoredRow = (String, String, String, Vec<u64>);

/// scores.csv's rows (plain ids), sorted.
fn csv_rows(csv: &[u8]) -> Vec<ScoredRow> {
    let text = String::from_utf8(csv.to_vec()).unwrap();
    let mut rows: Vec<ScoredRow> = text
        .lines()
        .skip(1)
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            (
                f[0].to_string(),
                f[1].to_string(),
                f[2].to_string(),
                f[3..]
                    .iter()
                    .map(|v| v.parse::<f64>().unwrap().to_bits())
                    .collect(),
            )
        })
        .collect();
    rows.sort();
    rows
}

/// The rows of the scores' Parquet parts of the run in `dir`, each named by
/// its id (checked against the demo row at its file and row, the source
/// having been the demo file in `files` parts).
fn parts_rows(dir: &Path, parts: &[String], files: usize) -> Vec<ScoredRow> {
    use datafusion::arrow::array::{Array, Int64Array};
    use datafusion::parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let demo = std::fs::read_to_string(root.join("demo-data/pump-housings.csv")).unwrap();
    let ids: Vec<&str> = demo
        .lines()
        .skip(1)
        .map(|l| l.split(',').next().unwrap())
        .collect();
    let chunk = ids.len().div_ceil(files);
    let mut rows = Vec::new();
    for p in parts {
        let file = std::fs::File::open(dir.join("out").join(p)).unwrap();
        let reader = ParquetRecordBatchReaderBuilder::try_new(file)
            .unwrap()
            .build()
            .unwrap();
        for b in reader {
            let b = b.unwrap();
            let schema = b.schema();
            let col = |n: &str| b.column(schema.index_of(n).unwrap()).clone();
            let (id, split) = (col("id"), col("split"));
            let id = id.as_any().downcast_ref::<StringArray>().unwrap();
            let split = split.as_any().downcast_ref::<StringArray>().unwrap();
            let (f, r, label) = (col("file"), col("row"), col("label"));
            let f = f.as_any().downcast_ref::<Int64Array>().unwrap();
            let r = r.as_any().downcast_ref::<Int64Array>().unwrap();
            let label = label.as_any().downcast_ref::<Int64Array>().unwrap();
            let first = schema.index_of("label").unwrap() + 1;
            for i in 0..b.num_rows() {
                let at = f.value(i) as usize * chunk + r.value(i) as usize;
                assert_eq!(
                    id.value(i),
                    ids[at],
                    "the id of file {} row {}",
                    f.value(i),
                    r.value(i)
                );
                rows.push((
                    id.value(i).to_string(),
                    split.value(i).to_string(),
                    label.value(i).to_string(),
                    (first..b.num_columns())
                        .map(|j| {
                            let c = b.column(j);
                            let c = c.as_any().downcast_ref::<Float64Array>().unwrap();
                            c.value(i).to_bits()
                        })
                        .collect(),
                ));
            }
        }
    }
    rows.sort();
    rows
}

/// Runs `anomark ARGS` in `dir`, returning (exit code, stderr).
fn anomark(dir: &Path, args: &[&str]) -> (i32, String) {
    let out = Command::new(BIN)
        .current_dir(dir)
        .args(args)
        .output()
        .unwrap();
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// The arguments of a final run of `spec.yaml` into `out`, with `extra`.
fn final_run_args<'a>(extra: &[&'a str]) -> Vec<&'a str> {
    let mut args = crate::util::SEALED_RUN.to_vec();
    args.extend(["--open-test", "--quiet"]);
    args.extend(extra);
    args
}

/// A final run of `spec.yaml` in `dir` into `out`, with `extra` arguments.
fn final_run(dir: &Path, extra: &[&str]) {
    let args = final_run_args(extra);
    let (code, stderr) = anomark(dir, &args);
    assert_eq!(code, 0, "anomark {}: {stderr}", args.join(" "));
}

/// Every file of run directory `dir` but the signature and the manifest.
fn run_files(dir: &Path) -> std::collections::BTreeMap<String, Vec<u8>> {
    let mut out = std::collections::BTreeMap::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                stack.push(p);
                continue;
            }
            let name = p.strip_prefix(dir).unwrap().to_string_lossy().into_owned();
            if name != "manifest.json" && name != "manifest.sig" {
                out.insert(name, std::fs::read(&p).unwrap());
            }
        }
    }
    out
}

/// The same spec and Parquet parts run in memory, with `--engine local`
/// (under a memory limit) and on a cluster of a scheduler and two executors
/// give the same run directory, byte for byte, but for run.json's one
/// `engine` field; each engine reads every row of every part once; an
/// engine run verifies by recomputation in memory. The spec has the
/// example's feature set and one of ratios, differences, products and
/// transforms without fitted parameters, computed on the engine. The
/// cluster plans eleven partitions (`--engine-task-rows 1000`).
#[test]
fn an_example_on_parquet_parts_gives_the_same_run_on_every_engine() {
    let top = tempfile::tempdir().unwrap();
    // Three parts everywhere (a cluster stage per file, met in a union).
    let mut written = Vec::new();
    let mut dir = |name: &str| {
        let d = top.path().join(name);
        std::fs::create_dir_all(&d).unwrap();
        written = pump_housing_on_parts(&d, 3);
        with_derived_features(&d);
        let (code, stderr) = anomark(
            &d,
            &["keygen", "--private", "key.pem", "--public", "key.pub.pem"],
        );
        assert_eq!(code, 0, "{stderr}");
        d
    };
    let (base, local, remote) = (dir("memory"), dir("local"), dir("cluster"));
    assert_eq!(written.len(), 3);
    // One key for all (the card shows its fingerprint).
    for d in [&local, &remote] {
        for f in ["key.pem", "key.pub.pem"] {
            std::fs::copy(base.join(f), d.join(f)).unwrap();
        }
    }
    final_run(&base, &[]);
    final_run(&local, &["--engine", "local", "--memory-limit", "256MiB"]);
    let (procs, url) = start(top.path(), &[], &[&[], &[]]);
    let ready = runtime().block_on(connect(&url)).map(drop);
    // A stalled cluster fails the test within two minutes, showing the logs.
    let outcome = ready.map(|_| {
        let mut child = Command::new(BIN)
            .current_dir(&remote)
            // Eleven partitions for the 10,024 rows (the default would plan
            // the client's cores): the numbers must not depend on them.
            .args(final_run_args(&[
                "--engine",
                &url,
                "--engine-task-rows",
                "1000",
            ]))
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        let started = Instant::now();
        while child.try_wait().unwrap().is_none() && started.elapsed() < Duration::from_secs(120) {
            std::thread::sleep(Duration::from_millis(50));
        }
        let _ = child.kill();
        child.wait_with_output().unwrap()
    });
    drop(procs);
    let out = outcome.unwrap();
    let logs: String = ["scheduler.log", "executor0.log", "executor1.log"]
        .iter()
        .map(|f| {
            let text = std::fs::read_to_string(top.path().join(f)).unwrap_or_default();
            let tail: Vec<&str> = text.lines().rev().take(15).collect();
            format!(
                "{f}:\n{}\n",
                tail.into_iter().rev().collect::<Vec<_>>().join("\n")
            )
        })
        .collect();
    assert!(
        out.status.success(),
        "the run on the cluster: {}\n{logs}",
        String::from_utf8_lossy(&out.stderr)
    );

    for (dir, engine) in [(&local, "local".to_string()), (&remote, url.clone())] {
        // No row read twice or missed: each part's rows as the engine
        // counted them are the rows the test wrote to it.
        let record: serde_json::Value =
            serde_json::from_slice(&std::fs::read(dir.join("out/run.json")).unwrap()).unwrap();
        let counted: Vec<usize> = record["inputs"]
            .as_array()
            .unwrap()
            .iter()
            .map(|i| i["rows"].as_u64().unwrap() as usize)
            .collect();
        assert_eq!(counted, written, "rows per part on {engine}");
        // The splits' rows (each numbered in its file) add up to the rows
        // written, so no place was read twice.
        let split: usize = record["split"]["counts"]
            .as_object()
            .unwrap()
            .values()
            .map(|c| (c["normal"].as_u64().unwrap() + c["anomaly"].as_u64().unwrap()) as usize)
            .sum();
        assert_eq!(
            split,
            written.iter().sum::<usize>(),
            "split rows on {engine}"
        );
        // The validation and test rows scored on the engine (their row
        // numbers in use): counted below, one row each in the scores' parts,
        // every housing id once.
        let held: usize = ["validation", "test"]
            .iter()
            .map(|p| {
                let c = &record["split"]["counts"][p];
                (c["normal"].as_u64().unwrap() + c["anomaly"].as_u64().unwrap()) as usize
            })
            .sum();
        let want = run_files(&base.join("out"));
        assert!(want.contains_key("scores.csv") && want.contains_key("card.html"));
        let mut got = run_files(&dir.join("out"));
        let record = String::from_utf8(got.remove("run.json").unwrap()).unwrap();
        let field = format!("  \"engine\": \"{engine}\",\n");
        assert!(record.contains(&field), "{record}");
        assert_eq!(
            record.replacen(&field, "", 1),
            String::from_utf8(want["run.json"].clone()).unwrap(),
            "run.json on {engine}"
        );
        // The engine wrote the scores as Parquet parts (no scores.csv):
        // their rows are scores.csv's, value for value; every other file is
        // the same.
        assert!(!got.contains_key("scores.csv"), "scores.csv on {engine}");
        let parts: Vec<String> = got
            .keys()
            .filter(|n| n.starts_with("scores/part-") && n.ends_with(".parquet"))
            .cloned()
            .collect();
        assert!(!parts.is_empty(), "no scores parts on {engine}");
        let scored = parts_rows(dir, &parts, written.len());
        let ids: std::collections::BTreeSet<&str> = scored.iter().map(|r| r.0.as_str()).collect();
        assert_eq!(scored.len(), held, "scored rows on {engine}");
        assert_eq!(
            ids.len(),
            held,
            "distinct ids among the scored rows on {engine}"
        );
        assert_eq!(scored, csv_rows(&want["scores.csv"]), "scores on {engine}");
        for (name, bytes) in &want {
            if name != "run.json" && name != "scores.csv" {
                assert!(got.get(name) == Some(bytes), "{name} differs on {engine}");
            }
        }
        assert_eq!(got.len() + 2, want.len() + parts.len(), "files on {engine}");
        // Each part is listed with its hash in the signed manifest.
        let manifest: serde_json::Value =
            serde_json::from_slice(&std::fs::read(dir.join("out").join("manifest.json")).unwrap())
                .unwrap();
        for p in &parts {
            let listed = manifest["files"][p]["blake3"].as_str().unwrap();
            assert_eq!(listed, blake3::hash(&got[p]).to_hex().as_str(), "{p}");
        }
        // The engine run recomputed in this process gives the same bytes.
        let (code, stderr) = anomark(dir, &["verify", "out", "--pubkey", "key.pub.pem", "--data"]);
        assert_eq!(code, 0, "verify --data of the run on {engine}: {stderr}");
        // `diff` pairs the engine run's test rows, read from its parts, with
        // the in-memory run's scores.csv: the same rows, no discordant pair.
        let old = base.join("out");
        let out = Command::new(BIN)
            .current_dir(dir)
            .args(["diff", old.to_str().unwrap(), "out", "--json"])
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "diff on {engine}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
        let tested = csv_rows(&want["scores.csv"])
            .iter()
            .filter(|r| r.1 == "test")
            .count();
        assert_eq!(v["paired"]["rows"], tested, "{v}");
        assert_eq!(v["paired"]["old-right-new-wrong"], 0, "{v}");
        assert_eq!(v["paired"]["old-wrong-new-right"], 0, "{v}");
    }
}

/// A spec beyond an engine's scope is refused with the reason before
/// anything is read or written.
#[test]
fn specs_beyond_an_engines_scope_are_refused_with_nothing_written() {
    let dir = tempfile::tempdir().unwrap();
    pump_housing_on_parts(dir.path(), 3);
    let (code, stderr) = anomark(
        dir.path(),
        &["keygen", "--private", "key.pem", "--public", "key.pub.pem"],
    );
    assert_eq!(code, 0, "{stderr}");
    let spec = std::fs::read_to_string(dir.path().join("spec.yaml")).unwrap();
    let cases = [
        (
            spec.replace(
                "  - multivariate-gaussian\n",
                "  - multivariate-gaussian\n  - knn-distance: {k: 3}\n",
            ),
            vec!["`detectors` cannot run on an engine", "knn-distance"],
        ),
        (
            spec.replace(
                "    - vacuum_mbar\n",
                "    - {column: vacuum_mbar, transform: [log, box-cox]}\n",
            ),
            vec![
                "cannot run on an engine",
                "vacuum_mbar",
                "`box-cox` has a parameter fitted on the training rows",
            ],
        ),
        (
            spec.replace(
                "    - vacuum_mbar\n",
                "    - {ratio: [vacuum_mbar, die_temp_c], transform: standardise}\n",
            ),
            vec![
                "cannot run on an engine",
                "`standardise` has a parameter fitted",
            ],
        ),
        (
            spec.replace("  features:\n", "  missing-values: drop-row\n  features:\n"),
            vec!["`data.missing-values` cannot run on an engine"],
        ),
        (
            spec.replace(
                "threshold: max-f1\n",
                "threshold:\n  conformal: {max-false-positive-rate: 0.05}\n",
            ),
            vec![
                "`threshold` cannot run on an engine",
                "sorted validation-normal",
            ],
        ),
    ];
    for (text, words) in cases {
        std::fs::write(dir.path().join("scope.yaml"), &text).unwrap();
        assert_ne!(text, spec);
        for engine in ["local", "df://127.0.0.1:9"] {
            let (code, stderr) = anomark(
                dir.path(),
                &[
                    "run",
                    "scope.yaml",
                    "--key",
                    "key.pem",
                    "--out",
                    "out",
                    "--engine",
                    engine,
                ],
            );
            assert_eq!(code, 2, "{stderr}");
            for w in &words {
                assert!(stderr.contains(w), "`{w}` not in: {stderr}");
            }
            assert!(!dir.path().join("out").exists());
        }
    }
    // A malformed engine, and a memory limit for a cluster, are usage errors.
    for args in [
        &["--engine", "spark://h:1"][..],
        &["--engine", "df://127.0.0.1:9", "--memory-limit", "1GiB"][..],
        &["--memory-limit", "1GiB"][..],
        &["--engine", "local", "--engine-task-rows", "5000"][..],
        &["--engine", "df://127.0.0.1:9", "--engine-task-rows", "10"][..],
    ] {
        let mut all = vec!["run", "spec.yaml", "--key", "key.pem", "--out", "out"];
        all.extend(args);
        let (code, stderr) = anomark(dir.path(), &all);
        assert_eq!(code, 2, "{stderr}");
        assert!(stderr.contains("--"), "{stderr}");
        assert!(!dir.path().join("out").exists());
    }
    // An executor's concurrent tasks out of bounds: refused before it starts.
    for n in ["0", "257"] {
        let (code, stderr) = anomark(
            dir.path(),
            &[
                "cluster",
                "executor",
                "--scheduler",
                "127.0.0.1:9",
                "--bind",
                "127.0.0.1:9",
                "--concurrent-tasks",
                n,
            ],
        );
        assert_eq!(code, 2, "{stderr}");
        assert!(
            stderr.contains(&format!("`--concurrent-tasks` must be 1 to 256, not {n}")),
            "{stderr}"
        );
    }
}

/// A training value a feature cannot take is refused on an engine with the
/// in-memory run's error and exit code (the feature, the rule, the file and
/// its first rows), nothing written: a `log` after a `sqrt` of a product
/// that is zero on every row, and a ratio over a zero denominator.
#[test]
fn a_refused_training_feature_is_named_as_in_memory() {
    let dir = tempfile::tempdir().unwrap();
    pump_housing_on_parts(dir.path(), 2);
    let (code, stderr) = anomark(
        dir.path(),
        &["keygen", "--private", "key.pem", "--public", "key.pub.pem"],
    );
    assert_eq!(code, 0, "{stderr}");
    // The parts again with a column `none_c`, zero on every row.
    let zero = dir.path().join("zero");
    std::fs::create_dir_all(&zero).unwrap();
    write_with_zero_column(&dir.path().join("parts"), &zero);
    let spec = std::fs::read_to_string(dir.path().join("spec.yaml")).unwrap();
    for (feature, words) in [
        (
            "{product: [die_temp_c, none_c], name: none, transform: [sqrt, log]}",
            "`log` cannot take this value",
        ),
        (
            "{ratio: [die_temp_c, none_c], name: per_none}",
            "the ratio is not finite",
        ),
    ] {
        let text = spec.replace("path: parts", "path: zero").replace(
            "    - vacuum_mbar\n",
            &format!("    - vacuum_mbar\n    - {feature}\n"),
        );
        std::fs::write(dir.path().join("refused.yaml"), &text).unwrap();
        let run = |extra: &[&str]| {
            let mut args = vec!["run", "refused.yaml", "--key", "key.pem", "--out", "out"];
            args.extend(extra);
            let (code, stderr) = anomark(dir.path(), &args);
            assert!(!dir.path().join("out").exists(), "{stderr}");
            (code, stderr)
        };
        let (code, memory) = run(&[]);
        assert_eq!(code, 3, "{memory}");
        assert!(memory.contains(words), "{memory}");
        let (code, local) = run(&["--engine", "local"]);
        assert_eq!(code, 3, "{local}");
        assert_eq!(local, memory);
    }
}

/// The Parquet parts of `from` written to `to` with one more column,
/// `none_c`, zero on every row.
fn write_with_zero_column(from: &Path, to: &Path) {
    use datafusion::parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    for e in std::fs::read_dir(from).unwrap() {
        let p = e.unwrap().path();
        let reader = ParquetRecordBatchReaderBuilder::try_new(std::fs::File::open(&p).unwrap())
            .unwrap()
            .build()
            .unwrap();
        let mut writer: Option<ArrowWriter<std::fs::File>> = None;
        for batch in reader {
            let batch = batch.unwrap();
            let mut fields: Vec<Field> = batch
                .schema()
                .fields()
                .iter()
                .map(|f| f.as_ref().clone())
                .collect();
            fields.push(Field::new("none_c", DataType::Float64, false));
            let schema = Arc::new(Schema::new(fields));
            let mut cols = batch.columns().to_vec();
            cols.push(Arc::new(Float64Array::from(vec![0.0; batch.num_rows()])));
            let out = RecordBatch::try_new(schema.clone(), cols).unwrap();
            let w = writer.get_or_insert_with(|| {
                let file = std::fs::File::create(to.join(p.file_name().unwrap())).unwrap();
                ArrowWriter::try_new(file, schema, None).unwrap()
            });
            w.write(&out).unwrap();
        }
        writer.unwrap().close().unwrap();
    }
}

/// The pump-housing example on its CSV (copied into `dir`, the spec
/// reading it, 50 bootstrap replicates, no output or ledger of its own),
/// with a key pair; `edit` changes the CSV's text.
fn pump_housing_csv(dir: &Path, edit: impl Fn(String) -> String) {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let demo = std::fs::read_to_string(root.join("demo-data/pump-housings.csv")).unwrap();
    std::fs::write(dir.join("housings.csv"), edit(demo)).unwrap();
    write_example_spec(dir, "housings.csv");
    let (code, stderr) = anomark(
        dir,
        &["keygen", "--private", "key.pem", "--public", "key.pub.pem"],
    );
    assert_eq!(code, 0, "{stderr}");
}

/// The example on its CSV with its spec edited by `spec`, run in memory
/// and on `--engine local` (in `top/memory` and `top/local`): the same run
/// directory but for run.json's engine line, and the scores as the
/// engine's Parquet parts holding scores.csv's rows value for value.
fn same_run_in_memory_and_local(top: &Path, spec: impl Fn(String) -> String) {
    let (memory, local) = (top.join("memory"), top.join("local"));
    for d in [&memory, &local] {
        std::fs::create_dir_all(d).unwrap();
        pump_housing_csv(d, |t| t);
        let text = std::fs::read_to_string(d.join("spec.yaml")).unwrap();
        std::fs::write(d.join("spec.yaml"), spec(text)).unwrap();
    }
    for f in ["key.pem", "key.pub.pem"] {
        std::fs::copy(memory.join(f), local.join(f)).unwrap();
    }
    final_run(&memory, &[]);
    final_run(&local, &["--engine", "local"]);
    let want = run_files(&memory.join("out"));
    let mut got = run_files(&local.join("out"));
    let record = String::from_utf8(got.remove("run.json").unwrap()).unwrap();
    assert_eq!(
        record.replacen("  \"engine\": \"local\",\n", "", 1),
        String::from_utf8(want["run.json"].clone()).unwrap()
    );
    // The scores are the engine's Parquet parts, scores.csv's rows value for
    // value; every other file is the same.
    let parts: Vec<String> = got
        .keys()
        .filter(|n| n.starts_with("scores/part-"))
        .cloned()
        .collect();
    assert_eq!(parts_rows(&local, &parts, 1), csv_rows(&want["scores.csv"]));
    for (name, bytes) in &want {
        if name != "run.json" && name != "scores.csv" {
            assert!(got.get(name) == Some(bytes), "{name} differs");
        }
    }
}

/// A fixed τ that no validation summary counts: the engine asks the
/// candidates' summaries again with τ as a cut point, together, and the
/// run is the in-memory one.
#[test]
fn a_fixed_threshold_on_an_engine_is_the_in_memory_run() {
    let top = tempfile::tempdir().unwrap();
    same_run_in_memory_and_local(top.path(), |spec| {
        assert!(spec.contains("threshold: max-f1"));
        spec.replace("threshold: max-f1", "threshold: {fixed: {tau: 21.37}}")
    });
}

/// A CSV source on `--engine local`: its numbers read by the library's
/// parser give the in-memory run byte for byte; a value that is not a
/// number is refused with the in-memory run's error and exit code (3, the
/// file, the column, the value and its lines), nothing written, on
/// `--engine local` and on a cluster alike.
#[test]
fn a_csv_on_an_engine_reads_numbers_as_in_memory() {
    let top = tempfile::tempdir().unwrap();
    same_run_in_memory_and_local(top.path(), |spec| spec);
    // Two values of `die_temp_c` that are not numbers (lines 5 and 9; one
    // with spaces around it, shown trimmed), and one in another column
    // later (line 12): the first column's are named.
    let bad = top.path().join("bad");
    std::fs::create_dir_all(&bad).unwrap();
    pump_housing_csv(&bad, |t| {
        t.lines()
            .enumerate()
            .map(|(i, l)| {
                let mut cells: Vec<String> = l.split(',').map(str::to_string).collect();
                match i + 1 {
                    5 => cells[2] = " 2o8.1 ".into(),
                    9 => cells[2] = "n/a".into(),
                    12 => cells[5] = "fifty".into(),
                    _ => {}
                }
                cells.join(",") + "\n"
            })
            .collect()
    });
    let run = |extra: &[&str]| {
        let mut args = vec!["run", "spec.yaml", "--key", "key.pem", "--out", "out"];
        args.extend(extra);
        let (code, stderr) = anomark(&bad, &args);
        assert!(!bad.join("out").exists(), "{stderr}");
        (code, stderr)
    };
    let (code, in_memory) = run(&[]);
    assert_eq!(code, 3, "{in_memory}");
    for w in [
        "housings.csv",
        "die_temp_c",
        "`2o8.1`",
        "not a number",
        "5",
        "9",
    ] {
        assert!(in_memory.contains(w), "`{w}` not in {in_memory}");
    }
    let (code, engine) = run(&["--engine", "local"]);
    assert_eq!(code, 3, "{engine}");
    assert_eq!(engine, in_memory);
    // The same refusal, word for word, from a cluster of a scheduler and two
    // executors (each query bounded, so a stalled cluster fails the test).
    let (procs, url) = start(top.path(), &[], &[&[], &[]]);
    let ready = runtime().block_on(connect(&url)).map(drop);
    let outcome = ready.map(|_| run(&["--engine", &url, "--engine-deadline", "120"]));
    drop(procs);
    let (code, cluster) = outcome.unwrap();
    assert_eq!(code, 3, "{cluster}");
    assert_eq!(cluster, in_memory);
}
