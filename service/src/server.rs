//! Assembly of `demefix serve`: opens the store, starts the compute pool, the workers and
//! the notifier of completion notifications ([`crate::notify`]), binds the HTTP server, and
//! owns the shutdown sequence.
//!
//! Shutdown (first SIGTERM or SIGINT): stop accepting connections and finish requests in
//! flight, tell every worker to stop its computation at the next chunk boundary and put its
//! run back in the queue, wait for them (and for notification attempts in flight), close
//! the database. A second signal exits at once;
//! the next start rescues whatever was left running once its lease expires.

use crate::config::{Config, LogFormat};
use crate::db::{DbError, Store};
use crate::http::{self, AppState};
use crate::worker::Workers;
use actix_web::{web, App, HttpServer};
use metrics_exporter_prometheus::{Matcher, PrometheusBuilder, PrometheusHandle};
use std::net::{SocketAddr, TcpListener};
use std::sync::atomic::AtomicUsize;
use std::sync::{Arc, OnceLock};
use tokio::sync::{watch, Notify};
use tokio::task::JoinHandle;

/// Why the service could not start.
#[derive(Debug, thiserror::Error)]
pub enum StartError {
    /// The database could not be opened or migrated.
    #[error("cannot open the database: {0}")]
    Db(#[from] DbError),
    /// The address could not be bound.
    #[error("cannot listen on {addr}: {source}")]
    Bind {
        /// Requested address.
        addr: SocketAddr,
        /// Cause.
        source: std::io::Error,
    },
    /// The compute pool could not be built.
    #[error("cannot start the compute pool: {0}")]
    Pool(#[from] rayon::ThreadPoolBuildError),
    /// The metrics recorder could not be installed.
    #[error("cannot install the metrics recorder: {0}")]
    Metrics(String),
    /// Anything else at the process edge.
    #[error("{0}")]
    Io(#[from] std::io::Error),
}

/// Buckets of the request latency histogram, seconds: fine around the 20 ms p99 target, so
/// `histogram_quantile(0.99, ...)` can be read against it.
const LATENCY_BUCKETS: &[f64] = &[
    0.001, 0.002, 0.005, 0.0075, 0.01, 0.015, 0.02, 0.03, 0.05, 0.1, 0.2, 0.5, 1.0, 2.0, 5.0,
];

/// The process-wide Prometheus recorder (installed once, shared by every server in the
/// process, e.g. in tests: there the counters add up over the servers, and the gauges read
/// from a database show the last one scraped; a deployment runs one server per process).
fn metrics_handle() -> Result<PrometheusHandle, StartError> {
    static HANDLE: OnceLock<Result<PrometheusHandle, String>> = OnceLock::new();
    HANDLE
        .get_or_init(|| {
            PrometheusBuilder::new()
                .set_buckets_for_metric(
                    Matcher::Suffix("_duration_seconds".to_owned()),
                    LATENCY_BUCKETS,
                )
                .map_err(|e| e.to_string())?
                .install_recorder()
                .map_err(|e| e.to_string())
                .inspect(|_| describe_metrics())
        })
        .clone()
        .map_err(StartError::Metrics)
}

/// Gives every metric of the service its help text (rendered as `# HELP` lines).
fn describe_metrics() {
    use metrics::{describe_counter, describe_gauge, describe_histogram, Unit};
    describe_histogram!(
        "demefix_http_request_duration_seconds",
        Unit::Seconds,
        "Time to answer an HTTP request, by method, route template and status."
    );
    describe_gauge!(
        "demefix_runs",
        Unit::Count,
        "Runs stored, by status (counted in the database at every scrape)."
    );
    describe_gauge!(
        "demefix_queue_depth",
        Unit::Count,
        "Runs queued and waiting for a worker (counted in the database at every scrape)."
    );
    describe_counter!(
        "demefix_runs_submitted_total",
        Unit::Count,
        "Runs accepted by POST /v1/runs (including those answered from an earlier run)."
    );
    describe_counter!(
        "demefix_runs_reused_total",
        Unit::Count,
        "Submissions answered with an earlier finished run's results, without computing."
    );
    describe_counter!(
        "demefix_matrices_stored_total",
        Unit::Count,
        "Matrices newly stored by POST /v1/matrices."
    );
    describe_counter!(
        "demefix_runs_finished_total",
        Unit::Count,
        "Completions recorded by this process's workers, by status."
    );
    describe_counter!(
        "demefix_ensemble_replicates_total",
        Unit::Count,
        "Ensemble replicates committed by this process's workers; rate() gives replicates \
         per second."
    );
    describe_histogram!(
        "demefix_db_write_duration_seconds",
        Unit::Seconds,
        "Time of one write on the single writer connection, waiting for it included, by \
         operation (submit, claim, heartbeat, commit_chunk, finish, ...)."
    );
    describe_histogram!(
        "demefix_wal_checkpoint_duration_seconds",
        Unit::Seconds,
        "Time of one background WAL checkpoint (PASSIVE, on its own connection)."
    );
    describe_gauge!(
        "demefix_ensemble_chunk_replicates_per_second",
        "Replicates per second of the most recently committed ensemble chunk."
    );
}

/// Installs the global log subscriber (`RUST_LOG` filter, default `info`).
pub fn init_logging(format: LogFormat) {
    use tracing_subscriber::EnvFilter;
    let filter = EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    let _ = match format {
        LogFormat::Json => builder.json().flatten_event(true).try_init(),
        LogFormat::Text => builder.try_init(),
    };
}

/// A started service.
pub struct Running {
    /// The address it listens on.
    pub addr: SocketAddr,
    /// The job store (tests inspect it).
    pub store: Store,
    server: actix_web::dev::ServerHandle,
    server_task: JoinHandle<std::io::Result<()>>,
    workers: Vec<JoinHandle<()>>,
    shutdown: watch::Sender<bool>,
}

/// Runs on each compute thread as it starts: the lowest scheduling priority (niceness 19 on
/// Linux, which needs no privilege), so that request handling preempts computation and the
/// API stays responsive while every worker is busy. Computation still gets every cycle the
/// requests leave; results do not depend on it.
fn lower_compute_priority(index: usize) {
    if let Err(e) =
        thread_priority::set_current_thread_priority(thread_priority::ThreadPriority::Min)
    {
        tracing::warn!(thread = index, error = ?e, "cannot lower the compute thread's priority");
    }
}

/// Checkpoints the WAL every [`crate::db::WAL_CHECKPOINT_EVERY`] until shutdown, off the
/// request path (the writer connection never checkpoints on a commit).
fn spawn_wal_checkpoints(store: Store, mut shutdown: watch::Receiver<bool>) -> JoinHandle<()> {
    tokio::spawn(async move {
        let mut tick = tokio::time::interval(crate::db::WAL_CHECKPOINT_EVERY);
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            tokio::select! {
                _ = tick.tick() => {
                    if let Err(e) = store.checkpoint_wal().await {
                        tracing::warn!(error = %e, "WAL checkpoint failed; retrying");
                    }
                }
                _ = shutdown.changed() => break,
            }
        }
    })
}

/// Opens the database, starts the workers and the HTTP server, and returns at once.
pub async fn start(config: Config) -> Result<Running, StartError> {
    let config = Arc::new(config);
    let store = Store::open(&config.db).await?;
    let metrics = metrics_handle()?;
    let pool = Arc::new(
        rayon::ThreadPoolBuilder::new()
            .num_threads(config.workers)
            .thread_name(|i| format!("demefix-compute-{i}"))
            .start_handler(lower_compute_priority)
            .build()?,
    );
    let wake = Arc::new(Notify::new());
    let alive = Arc::new(AtomicUsize::new(0));
    let (shutdown, shutdown_rx) = watch::channel(false);
    let wal_task = spawn_wal_checkpoints(store.clone(), shutdown_rx.clone());
    let shutdown_rx_for_notifier = shutdown_rx.clone();
    let mut workers = Workers {
        store: store.clone(),
        config: config.clone(),
        pool,
        wake: wake.clone(),
        shutdown: shutdown_rx,
        alive: alive.clone(),
    }
    .spawn();
    workers.push(wal_task);
    workers.push(crate::notify::spawn(
        store.clone(),
        crate::notify::RetryPolicy::of(&config),
        shutdown_rx_for_notifier,
    ));

    let state = web::Data::new(AppState {
        store: store.clone(),
        config: config.clone(),
        wake,
        workers_alive: alive,
        metrics,
    });
    let listener = TcpListener::bind(config.bind).map_err(|source| StartError::Bind {
        addr: config.bind,
        source,
    })?;
    let addr = listener.local_addr()?;
    let http_workers = std::thread::available_parallelism().map_or(1, |n| n.get().min(4));
    let server = HttpServer::new(move || {
        App::new()
            .app_data(state.clone())
            .wrap_fn(http::request_span)
            .configure(http::routes)
    })
    .workers(http_workers)
    .disable_signals()
    .shutdown_timeout(30)
    .listen(listener)?
    .run();
    let handle = server.handle();
    let server_task = tokio::spawn(server);
    tracing::info!(
        %addr,
        workers = config.workers,
        db = %config.db.display(),
        config_file = %config.file.as_deref().map_or("(none)".into(), |f| f.display().to_string()),
        "demefix serving"
    );
    Ok(Running {
        addr,
        store,
        server: handle,
        server_task,
        workers,
        shutdown,
    })
}

impl Running {
    /// Stops accepting, drains requests, puts running runs back in the queue, waits for the
    /// workers and closes the database.
    pub async fn stop(self) {
        self.server.stop(true).await;
        let _ = self.shutdown.send(true);
        for w in self.workers {
            let _ = w.await;
        }
        let _ = self.server_task.await;
        self.store.close().await;
        tracing::info!("demefix stopped");
    }

    /// Serves until SIGTERM or SIGINT, then stops as [`Running::stop`] says; a second signal
    /// exits the process at once.
    pub async fn run_until_signal(self) -> Result<(), StartError> {
        use tokio::signal::unix::{signal, SignalKind};
        let mut term = signal(SignalKind::terminate())?;
        let mut int = signal(SignalKind::interrupt())?;
        tokio::select! {
            _ = term.recv() => {}
            _ = int.recv() => {}
        }
        tracing::info!("signal received: draining (a second signal exits at once)");
        tokio::spawn(async move {
            tokio::select! {
                _ = term.recv() => {}
                _ = int.recv() => {}
            }
            tracing::warn!("second signal: exiting without draining");
            std::process::exit(130);
        });
        self.stop().await;
        Ok(())
    }
}

/// `demefix serve`: starts the service and runs it until a signal.
pub async fn serve(config: Config) -> Result<(), StartError> {
    start(config).await?.run_until_signal().await
}
