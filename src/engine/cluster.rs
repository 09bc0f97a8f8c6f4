//! A Ballista cluster of anomark processes: `anomark cluster scheduler` and
//! `anomark cluster executor` start the engine's processes with anomark's
//! functions registered, and [`connect`] opens a client session on one,
//! checking that every process runs the client's anomark version.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;

use ballista::prelude::{SessionConfigExt, SessionContextExt};
use datafusion::prelude::{SessionConfig, SessionContext};

use super::{engine_error, functions, register, state_with, version, Deadline};
use crate::error::{Error, Result};

/// How `anomark cluster scheduler` runs.
#[derive(Debug, Clone)]
pub struct SchedulerOptions {
    /// The address to listen on.
    pub bind: String,
    /// The version the process reports (a test hook; normally [`version`]).
    pub reported_version: String,
    /// Seconds without a heartbeat after which an executor is taken as lost
    /// and its tasks run again elsewhere.
    pub executor_timeout_seconds: u64,
}

/// The most tasks an executor runs at once (`--concurrent-tasks`): each
/// holds its share of the memory pool and its own buffers.
pub const CONCURRENT_TASKS_MAX: usize = 256;

/// Seconds the scheduler keeps a finished job's state (its stages and
/// tasks) before it forgets it (Ballista's default is an hour). A run asks
/// tens of questions, each a job of as many tasks as partitions, and the
/// client has its answer as soon as the job ends, so an hour of them only
/// grows the scheduler's memory with the run's length.
pub const FINISHED_JOB_STATE_SECONDS: u64 = 60;

/// Seconds between an executor's heartbeats to the scheduler.
pub const HEARTBEAT_SECONDS: u64 = 2;

/// How `anomark cluster executor` runs.
#[derive(Debug, Clone)]
pub struct ExecutorOptions {
    /// The scheduler's address.
    pub scheduler: String,
    /// The address to listen on (the flight port; the gRPC port is the next).
    pub bind: String,
    /// The directory for shuffle files (default: a temporary directory).
    pub work_dir: Option<PathBuf>,
    /// The memory pool's limit in bytes (default: none), shared evenly by
    /// the concurrent tasks.
    pub memory_limit: Option<u64>,
    /// Tasks run at once (default: the host's cores), within
    /// [`CONCURRENT_TASKS_MAX`].
    pub concurrent_tasks: Option<usize>,
    /// Leave anomark's functions out (a test hook: such an executor must be refused).
    pub without_functions: bool,
    /// The version the process reports (a test hook; normally [`version`]).
    pub reported_version: String,
}

/// `HOST:PORT` as a host and a port, refusing anything else by name.
pub fn host_port(what: &str, s: &str) -> Result<(String, u16)> {
    let usage = || Error::Usage {
        message: format!("`{what}` must be HOST:PORT, such as 127.0.0.1:50050, not `{s}`"),
    };
    let (host, port) = s.rsplit_once(':').ok_or_else(usage)?;
    let port: u16 = port.parse().map_err(|_| usage())?;
    if host.is_empty() {
        return Err(usage());
    }
    Ok((host.to_string(), port))
}

/// The engine's tokio runtime, on every core (the cluster commands, the
/// client and the tests).
pub fn runtime() -> Result<tokio::runtime::Runtime> {
    tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .map_err(|e| Error::Engine {
            message: format!("starting the engine's runtime: {e}"),
        })
}

/// Runs a scheduler until the process is stopped.
pub fn scheduler(opts: &SchedulerOptions) -> Result<()> {
    use ballista_scheduler::cluster::BallistaCluster;
    use ballista_scheduler::config::SchedulerConfig;
    use ballista_scheduler::scheduler_process::start_server;
    let (host, port) = host_port("--bind", &opts.bind)?;
    let addr: SocketAddr = format!("{host}:{port}").parse().map_err(|_| Error::Usage {
        message: format!(
            "`--bind` must be an IP address and port, not `{}`",
            opts.bind
        ),
    })?;
    let reported = opts.reported_version.clone();
    let config = SchedulerConfig {
        bind_host: host.clone(),
        external_host: host,
        bind_port: port,
        executor_timeout_seconds: opts.executor_timeout_seconds,
        no_executors_grace_period_seconds: opts.executor_timeout_seconds,
        expire_dead_executor_interval_seconds: HEARTBEAT_SECONDS,
        finished_job_state_clean_up_interval_seconds: FINISHED_JOB_STATE_SECONDS,
        override_session_builder: Some(Arc::new(move |config: SessionConfig| {
            state_with(config, &reported)
                .map_err(|e| datafusion::error::DataFusionError::Execution(e.to_string()))
        })),
        ..Default::default()
    };
    runtime()?.block_on(async move {
        let cluster = BallistaCluster::new_from_config(&config)
            .await
            .map_err(|e| engine_error("starting the scheduler", e))?;
        start_server(cluster, addr, Arc::new(config))
            .await
            .map_err(|e| engine_error("running the scheduler", e))
    })
}

/// Runs an executor until the process is stopped.
pub fn executor(opts: &ExecutorOptions) -> Result<()> {
    use ballista_core::registry::BallistaFunctionRegistry;
    use ballista_executor::executor_process::{start_executor_process, ExecutorProcessConfig};
    let (scheduler_host, scheduler_port) = host_port("--scheduler", &opts.scheduler)?;
    let (host, port) = host_port("--bind", &opts.bind)?;
    let grpc_port = port.checked_add(1).ok_or_else(|| Error::Usage {
        message: format!("`--bind` port {port} leaves no next port for the executor's gRPC"),
    })?;
    let concurrent_tasks = opts.concurrent_tasks.unwrap_or_else(super::cores);
    if !(1..=CONCURRENT_TASKS_MAX).contains(&concurrent_tasks) {
        return Err(Error::Usage {
            message: format!(
                "`--concurrent-tasks` must be 1 to {CONCURRENT_TASKS_MAX}, not {concurrent_tasks}"
            ),
        });
    }
    let registry = (!opts.without_functions).then(|| {
        let mut r = BallistaFunctionRegistry::default();
        for f in functions::scalar_functions(&opts.reported_version) {
            r.scalar_functions.insert(f.name().to_string(), f);
        }
        for f in functions::aggregate_functions() {
            r.aggregate_functions.insert(f.name().to_string(), f);
        }
        Arc::new(r)
    });
    let config = ExecutorProcessConfig {
        bind_host: host.clone(),
        external_host: Some(host),
        port,
        grpc_port,
        scheduler_host,
        scheduler_port,
        scheduler_connect_timeout_seconds: 30,
        work_dir: opts
            .work_dir
            .as_ref()
            .map(|p| p.to_string_lossy().into_owned()),
        memory_pool_size: opts.memory_limit,
        // Ballista's task slots: the scheduler hands this executor at most
        // this many tasks at once, and each task's pool is the limit over it.
        vcores: concurrent_tasks,
        executor_heartbeat_interval_seconds: HEARTBEAT_SECONDS,
        override_function_registry: registry,
        ..Default::default()
    };
    runtime()?.block_on(async move {
        start_executor_process(Arc::new(config))
            .await
            .map_err(|e| engine_error("running the executor", e))
    })
}

/// The words of an engine error when an executor could not decode a task
/// (it lacks anomark's functions).
const NOT_PREPARED: &str = "could not be prepared";

/// An engine error from a cluster, naming an executor without anomark's
/// functions when that is the cause.
pub fn cluster_error(doing: &str, e: impl std::fmt::Display) -> Error {
    let text = e.to_string();
    if text.contains(NOT_PREPARED) && !text.contains(functions::VERSION_MISMATCH) {
        return Error::Engine {
            message: format!(
                "{doing}: an executor could not run anomark's functions (is every executor \
                 started by `anomark cluster executor` of version {}?): {}",
                version(),
                text.trim_end_matches('.')
            ),
        };
    }
    engine_error(doing, e)
}

/// How a client session on a cluster runs.
#[derive(Debug, Clone, Copy)]
pub struct ConnectOptions {
    /// The target partitions of the session's plans.
    pub partitions: usize,
    /// How long the client waits for each query's answer, the handshake
    /// included, before it fails with [`Error::Engine`].
    pub deadline: Deadline,
}

impl ConnectOptions {
    /// `partitions` target partitions and the default [`Deadline`].
    pub fn new(partitions: usize) -> Self {
        ConnectOptions {
            partitions,
            deadline: Deadline::default(),
        }
    }
}

/// A client session on the cluster whose scheduler listens at `url`
/// (`df://HOST:PORT`), after the handshake: the scheduler plans, and an
/// executor runs, a query that every process of another anomark version
/// refuses, naming both versions. Every query of the session, the
/// handshake included, is bounded by `opts.deadline`.
pub async fn connect(url: &str, opts: &ConnectOptions) -> Result<SessionContext> {
    let doing = format!("connecting to the cluster at `{url}`");
    let config = opts
        .deadline
        .on(SessionConfig::new_with_ballista().with_target_partitions(opts.partitions));
    let state = state_with(config, version())?;
    let ctx = SessionContext::remote_with_state(url, state)
        .await
        .map_err(|e| cluster_error(&doing, e))?;
    // Ballista replaces the function list set before; register again.
    register(&ctx, version());
    super::collect(
        &ctx,
        &doing,
        &format!(
            "SELECT {}({})",
            functions::VERSION_CHECK,
            super::sql_text(version())
        ),
    )
    .await
    .map_err(|e| match e {
        Error::Engine { message } => cluster_error(&doing, message),
        e => e,
    })?;
    Ok(ctx)
}
