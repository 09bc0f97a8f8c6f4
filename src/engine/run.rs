//! `anomark run SPEC --engine local|df://HOST:PORT`: the ingest stage on an
//! engine ([`OnEngine`], one more [`Ingest`]), for the plans an engine runs
//! ([`check_scope`]).
//!
//! The engine reads the source's files (one table per file, each row
//! numbered in its file so that places and row order are the in-process
//! run's), refuses rows by [`crate::rules`], hashes and splits the rows, refuses
//! leakage, counts the splits, and summarises the training rows: their
//! moments by content-hash bucket per feature set, the train manifest by
//! bucket digests, and a systematic sample (every k-th row in content-hash
//! order) for the figures and the drift reference. The validation and test
//! rows stay on the engine (`super::held`): the later stages ask it for the
//! summaries they read, the same numbers, to the bit.

use std::collections::BTreeMap;

use datafusion::arrow::array::{Array, ArrayRef, Int64Array, StringArray};
use datafusion::arrow::compute::cast;
use datafusion::arrow::datatypes::{DataType, Field, Schema};
use datafusion::arrow::record_batch::RecordBatch;
use datafusion::execution::runtime_env::RuntimeEnvBuilder;
use datafusion::execution::session_state::SessionStateBuilder;
use datafusion::prelude::{CsvReadOptions, ParquetReadOptions, SessionConfig, SessionContext};
use ndarray::Array2;

use super::held::HeldOnEngine;
use super::{collect, engine_error, functions, sql_bytes, sql_text, version};
use crate::data::{self, Dataset, Dropped, Format, RowId, SourceFile};
use crate::error::{Error, Result};
use crate::features::{self, FittedFeatures};
use crate::part::Part;
use crate::progress::Progress;
use crate::protocol::held::Held;
use crate::protocol::ingest::{Ingest, Ingested, Training, SAMPLE_LIMITS};
use crate::protocol::Engine;
use crate::spec::{DetectorKind, FeatureInput, MissingPolicy, Plan, SplitPlan, TransformKind};
use crate::split::{self, SplitReport};

/// The ingest stage on an engine (`Engine::Local` or `Engine::Cluster`).
pub struct OnEngine(pub Engine);

impl Ingest for OnEngine {
    fn ingest(&self, plan: &Plan, progress: &Progress) -> Result<Ingested> {
        let runtime = super::cluster::runtime()?;
        let (ctx, mut ingested, held) = runtime.block_on(async {
            let stage = progress.stage("starting the engine session");
            let ctx = context(&self.0).await?;
            drop(stage);
            let task_rows = match &self.0 {
                Engine::Cluster { task_rows, .. } => Some(*task_rows),
                _ => None,
            };
            let (ingested, held) = ingest(&ctx, plan, task_rows, progress).await?;
            Ok::<_, Error>((ctx, ingested, held))
        })?;
        // The validation and test rows stay on the engine; the later
        // stages ask it for their summaries in this session.
        let (files, validation_manifest) = held;
        ingested.rows.held = Held::Engine(Box::new(HeldOnEngine {
            runtime,
            ctx,
            sets: feature_columns(plan)?,
            files,
            validation_manifest,
            ids: plan.id_column.is_some(),
        }));
        Ok(ingested)
    }
}

/// Per feature set, the SQL of its features on the engine's views (a plain
/// column as `x3`, anything else by [`feature_sql`]): what a candidate of
/// the set is scored from, the values the training moments were made of.
fn feature_columns(plan: &Plan) -> Result<Vec<Vec<String>>> {
    features::fit_without_rows(plan)?
        .iter()
        .map(|set| set.features.iter().map(|f| feature_sql(f, false)).collect())
        .collect()
}

/// Refuses, with the reason, a plan an engine does not run: anything but
/// one labelled CSV or Parquet source (a file, a glob or a directory of
/// parts), a protocol or from-column split (without groups), the
/// independent and multivariate Gaussians, features without fitted
/// parameters (columns, ratios, differences and products, with `log`,
/// `log1p` and `sqrt`), and `missing-values: refuse`. Reads no data, writes
/// nothing.
pub fn check_scope(plan: &Plan) -> Result<()> {
    let spec = plan.spec_path.display();
    let refuse = |field: &str, why: String| Error::Usage {
        message: format!("`{spec}`: `{field}` cannot run on an engine (`--engine`): {why}"),
    };
    if plan.sources.len() != 1 || plan.label.is_none() {
        return Err(refuse(
            "data",
            "an engine reads one labelled source (`data.path` with `data.label`), not separate \
             normal and anomaly sources"
                .into(),
        ));
    }
    match &plan.split {
        SplitPlan::Protocol { .. } | SplitPlan::FromColumn { group: None, .. } => {}
        SplitPlan::FromColumn { group: Some(_), .. } => {
            return Err(refuse(
                "split.from-column.group",
                "the group check of a fixed split is not an engine step".into(),
            ))
        }
        SplitPlan::Groups { .. } => {
            return Err(refuse(
                "split.groups",
                "an engine splits by protocol or from a column".into(),
            ))
        }
        SplitPlan::Time { .. } => {
            return Err(refuse(
                "split.time",
                "an engine splits by protocol or from a column".into(),
            ))
        }
    }
    if plan.missing != MissingPolicy::Refuse {
        return Err(refuse(
            "data.missing-values",
            "an engine refuses missing values (`refuse`, the default); it does not drop rows"
                .into(),
        ));
    }
    if let crate::spec::ThresholdPolicy::Conformal { .. } = plan.threshold {
        return Err(refuse(
            "threshold",
            "the conformal policy takes τ from every candidate's sorted validation-normal \
             scores, which an engine does not send to the client (it sends summaries); \
             choose another policy, or run in process"
                .into(),
        ));
    }
    for d in &plan.detectors {
        if !matches!(
            d,
            DetectorKind::IndependentGaussian | DetectorKind::MultivariateGaussian
        ) {
            return Err(refuse(
                "detectors",
                format!(
                    "`{}` is fitted on rows; an engine fits the independent and multivariate \
                     Gaussians, from the training rows' moments",
                    d.name()
                ),
            ));
        }
    }
    for set in &plan.feature_sets {
        for f in &set.features {
            let fitted = f.transforms.iter().find(|t| {
                !matches!(
                    t,
                    TransformKind::Log | TransformKind::Log1p | TransformKind::Sqrt
                )
            });
            if let Some(&t) = fitted {
                return Err(plan.error_at(
                    &f.at,
                    "data.features",
                    format!(
                        "feature `{}` cannot run on an engine (`--engine`): its transform `{}` \
                         has a parameter fitted on the training rows; an engine computes \
                         columns, ratios, differences and products with the transforms \
                         without fitted parameters (`log`, `log1p`, `sqrt`)",
                        f.name,
                        crate::spec::transform_name(t)
                    ),
                ));
            }
        }
    }
    Ok(())
}

/// Settings that keep each file one partition read in file order (so a
/// row's number in its file is its place), set on every engine session.
const ORDER_SETTINGS: [&str; 2] = [
    "datafusion.optimizer.repartition_file_scans = false",
    "datafusion.optimizer.enable_round_robin_repartition = false",
];

/// Settings of a cluster session besides [`ORDER_SETTINGS`]: Ballista's
/// static stage planner. Each file is read by a stage of its own (a
/// single-partition scan numbered by `ROW_NUMBER() OVER ()`), and the files'
/// stages meet in a union whose tasks each read a slice of its inputs. The
/// adaptive planner, on by default in Ballista 55, handed every task of
/// that union every file's rows (each row read once per task: two executors,
/// every count doubled); the static planner gives each task its own slice,
/// so every (file, row) place is read once (tests/it/cluster.rs counts them).
const CLUSTER_SETTINGS: [&str; 1] = ["ballista.planner.adaptive.enabled = false"];

/// A session on `engine`, anomark's functions registered and versions checked.
async fn context(engine: &Engine) -> Result<SessionContext> {
    let partitions = super::cores();
    let ctx = match engine {
        Engine::Local {
            memory_limit,
            deadline,
        } => {
            let config = super::Deadline::seconds(*deadline)?
                .on(SessionConfig::new().with_target_partitions(partitions));
            let mut runtime = RuntimeEnvBuilder::new();
            if let Some(limit) = memory_limit {
                let limit = usize::try_from(*limit).unwrap_or(usize::MAX);
                runtime = runtime.with_memory_limit(limit, 1.0);
            }
            let runtime = runtime
                .build_arc()
                .map_err(|e| engine_error("starting the engine", e))?;
            let mut state = SessionStateBuilder::new()
                .with_config(config)
                .with_runtime_env(runtime)
                .with_default_features()
                .build();
            super::register_state(&mut state, version())?;
            SessionContext::new_with_state(state)
        }
        Engine::Cluster { url, deadline, .. } => {
            let opts = super::cluster::ConnectOptions {
                partitions,
                deadline: super::Deadline::seconds(*deadline)?,
            };
            super::cluster::connect(url, &opts).await?
        }
        Engine::InProcess | Engine::Refused(_) => {
            return Err(Error::internal("an engine ingest without an engine"))
        }
    };
    let cluster = matches!(engine, Engine::Cluster { .. });
    let extra: &[&str] = if cluster { &CLUSTER_SETTINGS } else { &[] };
    for s in ORDER_SETTINGS.iter().chain(extra) {
        collect(&ctx, "configuring the session", &format!("SET {s}")).await?;
    }
    Ok(ctx)
}

/// A result column as Int64.
fn i64s(b: &RecordBatch, j: usize) -> Result<Int64Array> {
    let a: ArrayRef = cast(b.column(j), &DataType::Int64)
        .map_err(|e| engine_error("reading the engine's result", e))?;
    a.as_any()
        .downcast_ref::<Int64Array>()
        .cloned()
        .ok_or_else(|| Error::internal("an engine result not castable to Int64"))
}

/// A result column as text (Utf8, whichever string type the engine chose).
fn texts(b: &RecordBatch, j: usize) -> Result<StringArray> {
    let a: ArrayRef = cast(b.column(j), &DataType::Utf8)
        .map_err(|e| engine_error("reading the engine's result", e))?;
    a.as_any()
        .downcast_ref::<StringArray>()
        .cloned()
        .ok_or_else(|| Error::internal("an engine result not castable to text"))
}

/// One row rule checked over every row: the rows breaking it (an SQL
/// condition over the `src` view), the column named, and the refusal.
struct Rule {
    cond: String,
    column: String,
    /// The SQL of the value shown in the refusal (text), if any.
    value: Option<String>,
    refusal: fn(crate::rules::At, &str, &Plan) -> Error,
}

/// The place of row `r` (0-based in its file) of file `f`, in words.
fn place(files: &[SourceFile], f: i64, r: i64) -> String {
    let file = &files[f as usize];
    format!(
        "{} {} {}",
        file.shown,
        file.format.unit().word(),
        file.format.place(r as u64)
    )
}

/// Reads, checks, hashes and splits the plan's rows on the engine; returns
/// the splits' counts and manifests with the training rows' summaries (no
/// rows), and the source's files with the validation manifest for the
/// held splits' summaries.
async fn ingest(
    ctx: &SessionContext,
    plan: &Plan,
    task_rows: Option<u64>,
    progress: &Progress,
) -> Result<(Ingested, (Vec<SourceFile>, String))> {
    let source = &plan.sources[0];
    let label = plan.label.as_ref().expect("checked by the scope");
    let paths = data::expand(source, plan)?;
    let split_col = match &plan.split {
        SplitPlan::FromColumn { column, .. } => Some(column),
        _ => None,
    };
    let stage = progress.stage("hashing the source files");
    let mut files = paths
        .iter()
        .map(|p| SourceFile::hashed(p, plan, source))
        .collect::<Result<Vec<_>>>()?;
    drop(stage);
    let stage = progress.stage("registering the source files");
    let nx = plan.columns.len();
    let mut selects = Vec::with_capacity(files.len());
    for (i, file) in files.iter().enumerate() {
        let mut wanted: Vec<&str> = plan.columns.iter().map(|c| c.name.as_str()).collect();
        wanted.push(&label.column.name);
        wanted.extend(split_col.map(|c| c.name.as_str()));
        wanted.extend(plan.id_column.as_ref().map(|c| c.name.as_str()));
        data::refuse_repeated_names(&file.path, &file.shown, file.format, &wanted)?;
        let present = data::columns_of(&file.path, file.format)?;
        let names: Vec<String> = present.iter().map(|c| c.0.clone()).collect();
        for c in plan
            .columns
            .iter()
            .chain([&label.column])
            .chain(split_col)
            .chain(plan.id_column.iter())
        {
            if !names.contains(&c.name) {
                return Err(data::missing_column(plan, c, &file.shown, &names));
            }
        }
        let table = format!("anomark_src{i}");
        let path = file.path.to_string_lossy().into_owned();
        // The file's own extension, whatever its case (`format_of` chose by it).
        let ext = file
            .path
            .extension()
            .map(|e| format!(".{}", e.to_string_lossy()))
            .unwrap_or_default();
        let registered = match file.format {
            Format::Csv => {
                // Every column as text: features are read by the library's
                // number parser (`functions::NUMBER`), and a value that is
                // not a number is refused as in process (`check_rows`).
                let fields: Vec<Field> = names
                    .iter()
                    .map(|n| Field::new(n, DataType::Utf8, true))
                    .collect();
                let schema = Schema::new(fields);
                ctx.register_csv(
                    &table,
                    &path,
                    CsvReadOptions::new()
                        .has_header(true)
                        .schema(&schema)
                        .file_extension(&ext),
                )
                .await
            }
            Format::Parquet => {
                let options = ParquetReadOptions {
                    file_extension: &ext,
                    ..Default::default()
                };
                ctx.register_parquet(&table, &path, options).await
            }
        };
        registered.map_err(|e| engine_error(&format!("reading `{}`", file.shown), e))?;
        let q = super::quote;
        let mut cols = vec![
            format!("CAST({i} AS BIGINT) AS f"),
            "CAST(ROW_NUMBER() OVER () AS BIGINT) - 1 AS r".to_string(),
            format!("CAST({} AS VARCHAR) AS lab", q(&label.column.name)),
        ];
        if let Some(c) = &plan.id_column {
            cols.push(format!("CAST({} AS VARCHAR) AS id", q(&c.name)));
        }
        if let Some(c) = split_col {
            cols.push(format!("CAST({} AS VARCHAR) AS sp", q(&c.name)));
        }
        for (j, c) in plan.columns.iter().enumerate() {
            cols.push(match file.format {
                Format::Csv => format!("{}({}) AS x{j}", functions::NUMBER, q(&c.name)),
                Format::Parquet => format!("CAST({} AS DOUBLE) AS x{j}", q(&c.name)),
            });
        }
        for (j, c) in plan.columns.iter().enumerate() {
            cols.push(match file.format {
                Format::Csv => format!("CAST({} AS VARCHAR) AS t{j}", q(&c.name)),
                Format::Parquet => format!("CAST(NULL AS VARCHAR) AS t{j}"),
            });
        }
        selects.push(format!("SELECT {} FROM {table}", cols.join(", ")));
    }
    collect(
        ctx,
        "reading the data",
        &format!("CREATE VIEW src AS {}", selects.join(" UNION ALL ")),
    )
    .await?;
    drop(stage);

    let stage = progress.stage("checking the rows");
    for (f, n) in check_rows(ctx, plan, &files, split_col.map(|c| c.name.as_str())).await? {
        files[f].rows = n;
    }
    if let Some(task_rows) = task_rows {
        // From here on a hash-partitioned stage gives each task about
        // `task_rows` rows (`--engine-task-rows`).
        let rows = files.iter().map(|f| f.rows as u64).sum();
        let partitions = super::partitions_for(rows, task_rows, super::cores());
        collect(
            ctx,
            "configuring the session",
            &format!("SET datafusion.execution.target_partitions = {partitions}"),
        )
        .await?;
    }
    drop(stage);

    let stage = progress.stage("hashing and splitting on the engine");
    let xs: Vec<String> = (0..nx).map(|j| format!("x{j}")).collect();
    let xl = xs.join(", ");
    let extra = [
        plan.id_column.as_ref().map(|_| "id"),
        split_col.map(|_| "sp"),
    ]
    .into_iter()
    .flatten()
    .map(|c| format!("{c}, "))
    .collect::<String>();
    collect(
        ctx,
        "hashing the rows",
        &format!(
            "CREATE VIEW hashed AS SELECT f, r, a, {extra}{xl}, {hash}(a, {xl}) AS h FROM \
             (SELECT f, r, lab = {anomaly} AS a, {extra}{xl} FROM src WHERE {guard}({v}))",
            hash = functions::ROW_HASH,
            anomaly = sql_text(&label.anomaly),
            guard = functions::VERSION_CHECK,
            v = sql_text(version()),
        ),
    )
    .await?;
    let part = match &plan.split {
        SplitPlan::Protocol { seed, fractions } => {
            let cuts = super::split_cuts(ctx, "hashed", *seed, fractions).await?;
            format!(
                "{}({}, h, a)",
                functions::SPLIT,
                sql_bytes(&cuts.to_bytes())
            )
        }
        _ => "CAST(CASE sp WHEN 'train' THEN 0 WHEN 'validation' THEN 1 ELSE 2 END AS TINYINT)"
            .to_string(),
    };
    collect(
        ctx,
        "splitting",
        &format!("CREATE VIEW assigned AS SELECT *, {part} AS part FROM hashed"),
    )
    .await?;
    let check = super::split_check(ctx, "assigned").await?;
    let counts = check.counts;
    if check.leaked > 0 {
        let (n, h, [lo, hi]) = super::leakage(ctx, "assigned")
            .await?
            .ok_or_else(|| Error::internal("leakage counted but not found"))?;
        let rows = collect(
            ctx,
            "checking for leakage",
            &format!(
                "SELECT part, f, r FROM assigned WHERE h = {} ORDER BY part, f, r",
                sql_bytes(&h.0)
            ),
        )
        .await?;
        let mut first: [Option<String>; 2] = [None, None];
        for b in &rows {
            let (p, f, r) = (i64s(b, 0)?, i64s(b, 1)?, i64s(b, 2)?);
            for i in 0..b.num_rows() {
                let k = if p.value(i) == i64::from(lo) { 0 } else { 1 };
                first[k].get_or_insert_with(|| place(&files, f.value(i), r.value(i)));
            }
        }
        let name = |p: i8| Part::ALL[p as usize].name().to_string();
        return Err(Error::Leakage {
            splits: (name(lo), name(hi)),
            overlapping: n,
            first: (
                first[0].take().unwrap_or_default(),
                first[1].take().unwrap_or_default(),
            ),
        });
    }
    let rows_with_duplicates = check.rows_with_duplicates;
    drop(stage);

    let stage = progress.stage("summarising the training rows on the engine");
    let fitted: Vec<FittedFeatures> = features::fit_without_rows(plan)?;
    let columns: Vec<String> = plan.columns.iter().map(|c| c.name.clone()).collect();
    let (moments, per_bucket) = train_moments(ctx, &fitted, &files).await?;
    // The three splits' manifests in one pass (the validation and test ones
    // are recorded with the split).
    let [manifest, validation_manifest, test_manifest] = super::manifests_of(
        ctx,
        "assigned",
        [Part::Train as i8, Part::Validation as i8, Part::Test as i8],
    )
    .await?;
    let train_rows = counts[0].normal + counts[0].anomaly;
    let (sample, samples) = train_sample(ctx, nx, train_rows, &per_bucket, columns).await?;
    drop(stage);

    let stage = progress.stage("splitting and checking for leakage");
    let totals = counts
        .iter()
        .fold([0, 0], |t, c| [t[0] + c.normal, t[1] + c.anomaly]);
    let mut report = SplitReport {
        method: "from-column".into(),
        seed: None,
        requested: None,
        counts,
        rows_off_requested_counts: 0,
        rows_with_duplicates,
        groups: None,
        time_cuts: None,
    };
    if let SplitPlan::Protocol { seed, fractions } = &plan.split {
        let req = split::requested_of(totals, fractions);
        report.method = "protocol".into();
        report.seed = Some(*seed);
        report.rows_off_requested_counts = split::off_requested(&counts, &req);
        report.requested = Some(req);
    }
    let splits = split::summarised(report, test_manifest)?;
    drop(stage);
    // No row on the client: the files read and the columns, for the record.
    let data = Dataset {
        files: files.clone(),
        columns: plan.columns.iter().map(|c| c.name.clone()).collect(),
        x: Array2::zeros((0, nx)),
        is_anomaly: vec![],
        origin: vec![],
        ids: None,
        text: BTreeMap::new(),
        dropped: Dropped::default(),
    };
    let training = Training::Moments {
        fitted,
        moments,
        manifest,
        rows: train_rows,
        sample: Box::new(sample),
        samples,
    };
    Ok((
        Ingested::of(data, vec![], splits, training),
        (files, validation_manifest),
    ))
}

/// Refuses the first row rule broken anywhere, naming the rows (the first
/// file holding such a row, its first places, how many in all); else the
/// rows of each file (by its index), counted in the same pass.
async fn check_rows(
    ctx: &SessionContext,
    plan: &Plan,
    files: &[SourceFile],
    split_col: Option<&str>,
) -> Result<Vec<(usize, usize)>> {
    let label = plan.label.as_ref().expect("checked by the scope");
    let (normal, anomaly) = (sql_text(&label.normal), sql_text(&label.anomaly));
    // A CSV feature value that is not a number first, as in process.
    let mut rules: Vec<Rule> = (0..plan.columns.len())
        .map(|j| Rule {
            cond: format!("{}(t{j})", functions::NOT_NUMBER),
            column: plan.columns[j].name.clone(),
            value: Some(format!("COALESCE(t{j}, '')")),
            refusal: |at, v, _| crate::rules::not_a_number(at, Some(v.trim())),
        })
        .collect();
    rules.push(Rule {
        cond: format!("lab IS NULL OR (lab <> {normal} AND lab <> {anomaly})"),
        column: label.column.name.clone(),
        value: Some("COALESCE(lab, '')".into()),
        refusal: |at, v, plan| {
            let l = plan.label.as_ref().expect("checked by the scope");
            crate::rules::undeclared_label(at, v, &l.normal, &l.anomaly)
        },
    });
    if let Some(c) = &plan.id_column {
        rules.push(Rule {
            cond: "id IS NULL OR id = ''".into(),
            column: c.name.clone(),
            value: None,
            refusal: |at, _, _| crate::rules::empty_text(at),
        });
    }
    if let Some(c) = split_col {
        rules.push(Rule {
            cond: "sp IS NULL OR sp NOT IN ('train', 'validation', 'test')".into(),
            column: c.to_string(),
            value: Some("COALESCE(sp, '')".into()),
            refusal: |at, v, _| crate::rules::unknown_split(at, v),
        });
        rules.push(Rule {
            cond: format!("lab = {anomaly} AND sp = 'train'"),
            column: c.to_string(),
            value: None,
            refusal: |at, _, _| crate::rules::anomaly_in_train(at),
        });
    }
    for (j, c) in plan.columns.iter().enumerate() {
        rules.push(Rule {
            cond: format!("x{j} IS NULL OR isnan(x{j})"),
            column: c.name.clone(),
            value: None,
            refusal: |at, _, _| crate::rules::missing_value(at),
        });
        rules.push(Rule {
            cond: format!("x{j} IS NOT NULL AND NOT isnan(x{j}) AND isnan(x{j} - x{j})"),
            column: c.name.clone(),
            value: None,
            refusal: |at, _, _| crate::rules::infinite(at),
        });
    }
    let sums: Vec<String> = rules
        .iter()
        .map(|r| format!("SUM(CASE WHEN {} THEN 1 ELSE 0 END)", r.cond))
        .collect();
    // Per file: its rows, and the rows breaking each rule.
    let found = collect(
        ctx,
        "checking the rows",
        &format!(
            "SELECT f, COUNT(*), {} FROM src WHERE {}({}) GROUP BY f",
            sums.join(", "),
            functions::VERSION_CHECK,
            sql_text(version())
        ),
    )
    .await?;
    let mut rows = Vec::new();
    let mut broken = vec![0usize; rules.len()];
    for b in &found {
        let (f, n) = (i64s(b, 0)?, i64s(b, 1)?);
        for i in 0..b.num_rows() {
            rows.push((f.value(i) as usize, n.value(i) as usize));
        }
        for (k, t) in broken.iter_mut().enumerate() {
            let c = i64s(b, k + 2)?;
            *t += (0..b.num_rows())
                .filter(|&i| !c.is_null(i))
                .map(|i| c.value(i) as usize)
                .sum::<usize>();
        }
    }
    for (rule, &total) in rules.iter().zip(&broken) {
        if total == 0 {
            continue;
        }
        let value = rule.value.as_deref().unwrap_or("''");
        let first = collect(
            ctx,
            "checking the rows",
            &format!(
                "SELECT f, r, {value} FROM src WHERE {} ORDER BY f, r LIMIT 5",
                rule.cond
            ),
        )
        .await?;
        let mut at: Option<(i64, Vec<u64>, String)> = None;
        for b in &first {
            let (f, r, v) = (i64s(b, 0)?, i64s(b, 1)?, texts(b, 2)?);
            for i in 0..b.num_rows() {
                let a = at.get_or_insert_with(|| (f.value(i), vec![], v.value(i).to_string()));
                if a.0 == f.value(i) {
                    let file = &files[a.0 as usize];
                    a.1.push(file.format.place(r.value(i) as u64));
                }
            }
        }
        let (f, lines, v) = at.ok_or_else(|| Error::internal("a counted row not found"))?;
        let file = &files[f as usize];
        return Err((rule.refusal)(
            crate::rules::At {
                path: file.shown.clone().into(),
                column: rule.column.clone(),
                lines,
                total,
                unit: file.format.unit(),
            },
            &v,
            plan,
        ));
    }
    Ok(rows)
}

/// The SQL of feature `f` on the rows of `assigned`: a plain column as
/// it is, anything else by [`functions::FEATURE`] (or `check`,
/// [`functions::FEATURE_CHECK`]), the library's one definition.
fn feature_sql(f: &features::FittedFeature, check: bool) -> Result<String> {
    let bytes = functions::feature_to_bytes(f)
        .ok_or_else(|| Error::internal("a fitted transform past the engine's scope"))?;
    let (a, b) = match f.input {
        FeatureInput::Column(a) => (a, a),
        FeatureInput::Ratio(a, b)
        | FeatureInput::Difference(a, b)
        | FeatureInput::Product(a, b) => (a, b),
    };
    Ok(match (check, bytes.as_slice()) {
        (false, [0]) => format!("x{a}"),
        _ => format!(
            "{}({}, x{a}, x{b})",
            if check {
                functions::FEATURE_CHECK
            } else {
                functions::FEATURE
            },
            sql_bytes(&bytes)
        ),
    })
}

/// The training moments of each feature set (`fitted`, without fitted
/// parameters), computed on the engine from the features' values there
/// ([`functions::FEATURE`]), after refusing, as the in-memory fit does and
/// in its order (set by set, feature by feature, rule by rule), training
/// rows whose feature is not finite, outside a transform's domain, or
/// beyond ±`features::TRAIN_LIMIT`: one pass finds the first rule broken
/// per feature, two more name the rows of the first feature refused. With
/// them, the training rows per content-hash bucket (from the first set's
/// bucket moments), for the samples.
async fn train_moments(
    ctx: &SessionContext,
    fitted: &[FittedFeatures],
    files: &[SourceFile],
) -> Result<(Vec<crate::moments::Moments>, BTreeMap<u16, u64>)> {
    let doing = "checking the training rows";
    let all: Vec<&features::FittedFeature> = fitted.iter().flat_map(|s| &s.features).collect();
    if !all.is_empty() {
        let mins = all
            .iter()
            .enumerate()
            .map(|(k, f)| Ok(format!("MIN(NULLIF({}, 0)) AS m{k}", feature_sql(f, true)?)))
            .collect::<Result<Vec<_>>>()?;
        let found = collect(
            ctx,
            doing,
            &format!("SELECT {} FROM assigned WHERE part = 0", mins.join(", ")),
        )
        .await?;
        if let Some(b) = found.iter().find(|b| b.num_rows() > 0) {
            for (k, f) in all.iter().enumerate() {
                let code = i64s(b, k)?;
                if code.is_null(0) {
                    continue;
                }
                let code = code.value(0);
                let refusal = functions::refusal_of_code(code, f.transforms.len())
                    .ok_or_else(|| Error::internal("a feature refusal code out of range"))?;
                // As the in-memory fit names them: the training rows in
                // (content hash, row) order, the first one's file, and its
                // first rows so refused.
                let cond = format!("part = 0 AND {} = {code}", feature_sql(f, true)?);
                let first = collect(
                    ctx,
                    doing,
                    &format!(
                        "SELECT COUNT(*) OVER () AS n, f FROM assigned WHERE {cond} \
                         ORDER BY h, f, r LIMIT 1"
                    ),
                )
                .await?;
                let b = first
                    .iter()
                    .find(|b| b.num_rows() > 0)
                    .ok_or_else(|| Error::internal("a refused training row not found"))?;
                let (n, fi) = (i64s(b, 0)?.value(0), i64s(b, 1)?.value(0));
                let rows = collect(
                    ctx,
                    doing,
                    &format!(
                        "SELECT r FROM assigned WHERE {cond} AND f = {fi} ORDER BY h, r LIMIT 5"
                    ),
                )
                .await?;
                let file = &files[fi as usize];
                let mut lines = Vec::new();
                for b in &rows {
                    let r = i64s(b, 0)?;
                    lines.extend((0..b.num_rows()).map(|i| file.format.place(r.value(i) as u64)));
                }
                return Err(f.train_refusal(
                    refusal,
                    crate::rules::At {
                        path: file.shown.clone().into(),
                        column: f.name.clone(),
                        lines,
                        total: n as usize,
                        unit: file.format.unit(),
                    },
                ));
            }
        }
    }
    let mut moments = Vec::with_capacity(fitted.len());
    let mut rows = BTreeMap::new();
    for (si, set) in fitted.iter().enumerate() {
        let cols = set
            .features
            .iter()
            .enumerate()
            .map(|(j, f)| Ok(format!("{} AS g{j}", feature_sql(f, false)?)))
            .collect::<Result<Vec<_>>>()?;
        let view = format!("anomark_set{si}");
        collect(
            ctx,
            "computing the features",
            &format!(
                "CREATE VIEW {view} AS SELECT h, part, {} FROM assigned",
                cols.join(", ")
            ),
        )
        .await?;
        let names: Vec<String> = (0..set.features.len()).map(|j| format!("g{j}")).collect();
        let buckets = super::bucket_moments(ctx, &view, Part::Train as i8, &names).await?;
        if si == 0 {
            rows = buckets.iter().map(|(b, m)| (*b, m.n)).collect();
        }
        moments.push(crate::moments::fold_buckets(names.len(), buckets)?);
    }
    Ok((moments, rows))
}

/// The systematic samples of the training rows for each of
/// [`SAMPLE_LIMITS`]: every k-th row in content-hash order (ties in file
/// order), k = ⌈training rows / limit⌉, as a streamed run keeps them.
async fn train_sample(
    ctx: &SessionContext,
    nx: usize,
    train_rows: usize,
    per_bucket: &BTreeMap<u16, u64>,
    columns: Vec<String>,
) -> Result<(Dataset, Vec<Vec<RowId>>)> {
    let strides: Vec<usize> = SAMPLE_LIMITS
        .iter()
        .map(|&l| train_rows.div_ceil(l.max(1)).max(1))
        .collect();
    // Each content-hash bucket numbered on its own and every k-th row kept
    // on the engine (`super::sample`): no sort merged across partitions (one
    // stalled Ballista 55 in the suite's cluster), no training row sent to
    // the client but the sampled ones.
    let kept = super::sample::every_kth(ctx, nx, per_bucket, &strides).await?;
    sample_of(kept, &strides, columns, nx)
}

/// The sampled training rows (their rank in content-hash order and their
/// values, in rank order) as the sample dataset and, per stride, its rows.
fn sample_of(
    kept: Vec<(usize, Vec<f64>)>,
    strides: &[usize],
    columns: Vec<String>,
    nx: usize,
) -> Result<(Dataset, Vec<Vec<RowId>>)> {
    let mut samples: Vec<Vec<RowId>> = vec![Vec::new(); strides.len()];
    let mut x = Vec::with_capacity(kept.len() * nx);
    for (at, (k, values)) in kept.iter().enumerate() {
        for (w, s) in strides.iter().enumerate() {
            if k.is_multiple_of(*s) {
                samples[w].push(RowId(at as u64));
            }
        }
        x.extend_from_slice(values);
    }
    let sample = Dataset::sample_of(columns, x)?;
    Ok((sample, samples))
}
