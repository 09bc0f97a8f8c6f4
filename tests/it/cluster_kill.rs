//! An executor killed mid-query (the `cluster` feature): a scheduler and two
//! executors started as separate processes on 127.0.0.1, the engine steps
//! run on Parquet parts, and one executor killed (SIGKILL) as soon as it
//! has written its first shuffle file of the steps, so that a query is under way and
//! needs what it held. The steps must then either finish with the values
//! one process computes (the scheduler took the executor as lost and ran
//! its tasks again on the other) or fail cleanly with an engine error
//! (exit code 5) within the client's deadline; never hang. Every process is
//! stopped by the test, whatever happens.

use std::path::Path;
use std::time::{Duration, Instant};

use anomark::engine::{self, cluster, Deadline};

use crate::cluster::{runtime, start, steps, write_parts};

/// How many shuffle files `dir` holds at any depth (an executor writes each
/// task's output as `JOB/STAGE/PARTITION/data-TASK.arrow` under its work
/// directory, the final stage's too).
fn shuffle_files(dir: &Path) -> usize {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return 0;
    };
    entries
        .flatten()
        .map(|e| match e.file_type() {
            Ok(t) if t.is_dir() => shuffle_files(&e.path()),
            Ok(_) => usize::from(e.file_name().to_string_lossy().ends_with(".arrow")),
            Err(_) => 0,
        })
        .sum()
}

/// The client's deadline per query here: long enough for the scheduler to
/// notice the lost executor (`--executor-timeout 4`, heartbeats every 2 s)
/// and run its tasks again, short enough that a stall ends the test soon.
const DEADLINE_SECONDS: u64 = 40;

#[test]
fn an_executor_killed_mid_query_lets_the_steps_finish_or_fail_cleanly() {
    let dir = tempfile::tempdir().unwrap();
    let parts = dir.path().join("parts");
    write_parts(&parts, 25_000);
    let rt = runtime();
    let local = rt.block_on(async {
        let ctx = engine::local_context(1, 8192).unwrap();
        steps(&ctx, &parts).await.unwrap()
    });
    let (mut procs, url) = start(dir.path(), &["--executor-timeout", "4"], &[&[], &[]]);
    let opts = cluster::ConnectOptions {
        partitions: 8,
        deadline: Deadline::seconds(DEADLINE_SECONDS).unwrap(),
    };
    let ctx = rt
        .block_on(crate::cluster::connect_with(&url, &opts))
        .unwrap();
    assert_eq!(Deadline::of(&ctx).as_seconds(), DEADLINE_SECONDS);
    // The first executor's work directory (see `start`): killed as soon as
    // a shuffle file of the steps appears there (beyond the handshake's), or
    // after 30 s if none ever does.
    let work = dir.path().join("work0");
    let before = shuffle_files(&work);
    let started = Instant::now();
    let (outcome, killed) = std::thread::scope(|s| {
        let run = s.spawn(|| rt.block_on(steps(&ctx, &parts)));
        let mut killed = None;
        while !run.is_finished() {
            if killed.is_none()
                && (shuffle_files(&work) > before || started.elapsed().as_secs() > 30)
            {
                // `Child::kill` sends SIGKILL on Unix.
                procs.0[1].kill().unwrap();
                killed = Some(started.elapsed());
            }
            std::thread::sleep(Duration::from_millis(5));
        }
        (run.join().unwrap(), killed)
    });
    let elapsed = started.elapsed();
    drop(procs);
    let killed = killed.expect("the executor was killed while the steps ran");
    eprintln!(
        "executor killed after {killed:?}; steps ended after {elapsed:?}: {}",
        match &outcome {
            Ok(_) => "finished".to_string(),
            Err(e) => format!("failed: {e}"),
        }
    );
    match outcome {
        Ok(remote) => assert_eq!(remote, local),
        Err(e) => {
            assert_eq!(e.code(), 5, "{e}");
            // Each query is bounded by the deadline; the steps run eleven.
            assert!(
                elapsed < Duration::from_secs(11 * DEADLINE_SECONDS + 10),
                "{e}"
            );
        }
    }
}
