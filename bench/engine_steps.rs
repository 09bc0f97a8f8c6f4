//! Times anomark's engine steps on a Ballista cluster of anomark processes,
//! for `scripts/bench-cluster` while a full run on an engine is not there:
//! the library's steps in the order a run takes them, nothing else (no
//! spec, no card, no signing, nothing written).
//!
//! ```text
//! engine-steps df://HOST:PORT PARTS_DIR [DEADLINE_SECONDS]
//! ```
//!
//! `PARTS_DIR` holds the Parquet parts of `make_data.py`'s columns (`label`
//! 0 or 1, features `f00` to `f15`). The steps: each row's content hash,
//! the exact protocol split (seed 1; normal rows 60/20/20, anomalies 50/50),
//! rows per split, the leakage check, the training moments, the three split
//! manifests, the multivariate Gaussian's scores and the validation summary.
//! Prints one JSON object: seconds per step and the counts per split.

use std::time::Instant;

use anomark::engine::{self, cluster, functions, Deadline};
use anomark::spec::{Fractions, Seed};
use datafusion::prelude::ParquetReadOptions;

fn main() {
    if let Err(e) = run() {
        eprintln!("engine-steps: {e}");
        std::process::exit(e.code());
    }
}

fn run() -> anomark::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let usage = || anomark::Error::Usage {
        message: "usage: engine-steps df://HOST:PORT PARTS_DIR [DEADLINE_SECONDS]".into(),
    };
    let (url, parts) = match &args[..] {
        [u, p] | [u, p, _] => (u.clone(), p.clone()),
        _ => return Err(usage()),
    };
    let deadline = match args.get(2) {
        Some(s) => Deadline::seconds(s.parse().map_err(|_| usage())?)?,
        None => Deadline::default(),
    };
    cluster::runtime()?.block_on(async move {
        let mut times = Vec::new();
        let mut t = Instant::now();
        let mut lap = |name: &str, times: &mut Vec<(String, f64)>| {
            times.push((name.to_string(), t.elapsed().as_secs_f64()));
            t = Instant::now();
        };
        let ctx = cluster::connect(
            &url,
            &cluster::ConnectOptions {
                partitions: 8,
                deadline,
            },
        )
        .await?;
        lap("connect", &mut times);
        ctx.register_parquet("data", &parts, ParquetReadOptions::default())
            .await
            .map_err(|e| engine::engine_error("reading the parts", e))?;
        let features: Vec<String> = (0..16).map(|j| format!("f{j:02}")).collect();
        engine::hashed_view(&ctx, "hashed", "data", "label = 1", &features).await?;
        let fractions = Fractions {
            normal: [0.6, 0.2, 0.2],
            anomaly: [0.5, 0.5],
        };
        let cuts = engine::split_cuts(&ctx, "hashed", Seed(1), &fractions).await?;
        lap("split", &mut times);
        engine::collect(
            &ctx,
            "assigning the splits",
            &format!(
                "CREATE VIEW assigned AS SELECT *, {}({}, h, a) AS part FROM hashed",
                functions::SPLIT,
                engine::sql_bytes(&cuts.to_bytes())
            ),
        )
        .await?;
        let check = engine::split_check(&ctx, "assigned").await?;
        lap("counts, repeats and leakage", &mut times);
        let moments = engine::moments(&ctx, "assigned", 0, &features).await?;
        lap("moments", &mut times);
        engine::manifests_of(&ctx, "assigned", [0, 1, 2]).await?;
        lap("manifests", &mut times);
        let model = functions::ModelParams::Multivariate {
            mean: moments.mean.clone(),
            covariance: moments.covariance(),
        };
        let cols: Vec<String> = features.iter().map(|f| engine::quote(f)).collect();
        engine::collect(
            &ctx,
            "scoring",
            &format!(
                "CREATE VIEW scored AS SELECT *, {}({}, {}) AS s FROM assigned",
                functions::SCORE,
                engine::sql_bytes(&model.to_bytes()),
                cols.join(", ")
            ),
        )
        .await?;
        let summary = engine::summary(&ctx, "scored", "s", 1, &[])
            .await?
            .ok_or_else(|| anomark::Error::internal("a validation score is not a number"))?;
        lap("validation summary", &mut times);
        let steps: Vec<String> = times
            .iter()
            .map(|(n, s)| format!("\"{n}\": {s:.3}"))
            .collect();
        println!(
            "{{\"steps\": {{{}}}, \"counts\": \"{:?}\", \"leaking-contents\": {}, \
             \"summary-cut-points\": {}}}",
            steps.join(", "),
            check.counts,
            check.leaked,
            summary.cut_points().len()
        );
        Ok(())
    })
}
