//! The worker pool: claims queued runs, computes them on the bounded CPU pool, keeps their
//! lease alive, and records how they ended.
//!
//! This module owns the life of a claimed run: the lease token handed out by
//! [`Store::claim`] (which also rescues runs whose lease expired), the heartbeat task that
//! extends the lease, publishes progress and notices a cancellation request or a lost lease,
//! the computation itself (`compute::run_resumable` on a blocking thread inside the shared rayon pool,
//! never on the async runtime), and the completion, which the store accepts only while the
//! token still holds the lease (fencing). On shutdown a running computation is stopped at its
//! next chunk boundary and the run goes back to the queue, neither lost nor failed.
//!
//! Ensembles append one checkpoint step per chunk (`compute::ChunkStep`: what the chunk added
//! to its cell's integer accumulator) to the run's log, guarded by the lease token; a run
//! interrupted by a crash or a shutdown replays its log when it is claimed again, resumes
//! after its last committed chunk and ends byte-identical to an uninterrupted run. Each
//! commit carries one chunk's data, however long the run.
//!
//! Metrics: `demefix_runs_finished_total{status}` counts accepted completions;
//! `demefix_ensemble_replicates_total` counts the ensemble replicates of every committed
//! chunk (Prometheus `rate()` of it is the replicates per second), and
//! `demefix_ensemble_chunk_replicates_per_second` is the rate of the most recent chunk.

use crate::compute::{self, ChunkStep, ComputeError, EnsembleCheckpoint};
use crate::config::Config;
use crate::db::{Claim, Store};
use crate::domain::Finish;
use crate::provenance::Provenance;
use crate::spec;
use demefix_science::ensemble::ProgressObserver;
use std::cell::Cell;
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};
use tokio::sync::{watch, Notify};
use tokio::task::JoinHandle;
use tracing::{error, info, info_span, warn, Instrument};

/// How often an idle worker looks for work (and for expired leases) without being woken.
const IDLE_POLL: Duration = Duration::from_millis(500);

/// What every worker shares.
#[derive(Clone)]
pub struct Workers {
    /// The job store.
    pub store: Store,
    /// The service configuration.
    pub config: Arc<Config>,
    /// The bounded CPU pool every computation runs on.
    pub pool: Arc<rayon::ThreadPool>,
    /// Woken when a run is submitted.
    pub wake: Arc<Notify>,
    /// Becomes `true` when the service shuts down.
    pub shutdown: watch::Receiver<bool>,
    /// Number of worker loops still running (for `/readyz`).
    pub alive: Arc<AtomicUsize>,
}

impl Workers {
    /// Starts `self.config.workers` worker loops.
    pub fn spawn(&self) -> Vec<JoinHandle<()>> {
        (0..self.config.workers)
            .map(|n| {
                let w = self.clone();
                tokio::spawn(w.run_loop().instrument(info_span!("worker", worker = n)))
            })
            .collect()
    }

    async fn run_loop(mut self) {
        let _alive = Alive::new(&self.alive);
        loop {
            if *self.shutdown.borrow() {
                break;
            }
            let token = uuid::Uuid::now_v7().to_string();
            match self.store.claim(&token, self.config.lease).await {
                Ok(Some(claim)) => {
                    let span = info_span!("run", run_id = %claim.id, attempt = claim.attempt);
                    self.process(claim, token).instrument(span).await;
                }
                Ok(None) => {
                    tokio::select! {
                        () = self.wake.notified() => {}
                        () = tokio::time::sleep(IDLE_POLL) => {}
                        _ = self.shutdown.changed() => {}
                    }
                }
                Err(e) => {
                    error!(error = %e, "cannot claim a run");
                    tokio::time::sleep(IDLE_POLL).await;
                }
            }
        }
    }

    async fn end(&self, id: &str, token: &str, finish: Finish) {
        let what = match &finish {
            Finish::Succeeded { .. } => "succeeded",
            Finish::Failed { .. } => "failed",
            Finish::Cancelled => "cancelled",
        };
        match self.store.finish(id, token, &finish).await {
            Ok(true) => {
                metrics::counter!("demefix_runs_finished_total", "status" => what).increment(1);
                info!(status = what, "run finished");
            }
            Ok(false) => warn!(
                status = what,
                "completion rejected: this worker no longer holds the lease"
            ),
            Err(e) => error!(error = %e, status = what, "cannot record the end of the run"),
        }
    }

    async fn process(&self, claim: Claim, token: String) {
        info!("run claimed");
        if claim.cancel_requested {
            return self.end(&claim.id, &token, Finish::Cancelled).await;
        }
        let prepared = serde_json::from_str::<serde_json::Value>(&claim.spec)
            .map_err(|e| format!("the stored spec is not JSON: {e}"))
            .and_then(|doc| {
                spec::validate(&doc, &self.config.limits()).map_err(|problems| {
                    let list: Vec<String> = problems
                        .iter()
                        .map(|p| format!("{}: {}", p.pointer, p.detail))
                        .collect();
                    format!(
                        "the stored spec no longer passes validation under this deployment's \
                         limits: {}",
                        list.join("; ")
                    )
                })
            })
            .and_then(|job| Ok((job, claim.warnings.clone()?)));
        let (job, mut warnings) = match prepared {
            Ok(x) => x,
            Err(error) => return self.end(&claim.id, &token, Finish::Failed { error }).await,
        };

        let flags = Arc::new(RunFlags::default());
        let stop_heartbeat = Arc::new(Notify::new());
        let heartbeat = tokio::spawn(
            heartbeat(
                self.clone(),
                claim.id.clone(),
                token.clone(),
                flags.clone(),
                stop_heartbeat.clone(),
            )
            .in_current_span(),
        );
        let pool = self.pool.clone();
        let threads = pool.current_num_threads();
        let span = tracing::Span::current();
        let compute_flags = flags.clone();
        let resume = read_checkpoint(&claim.checkpoint);
        let unreadable = resume.is_none() && !claim.checkpoint.is_empty();
        if let Some(cp) = &resume {
            info!(
                chunks = cp.steps.len(),
                replicates = cp.replicates(),
                "resuming after the last committed chunk"
            );
        }
        let committer = Committer {
            runtime: tokio::runtime::Handle::current(),
            store: self.store.clone(),
            id: claim.id.clone(),
            token: token.clone(),
            lease: self.config.lease,
            flags: flags.clone(),
            next_seq: Cell::new(if unreadable {
                0
            } else {
                claim.checkpoint.len() as u64
            }),
            last_commit: Cell::new(Instant::now()),
        };
        if unreadable {
            warn!("unreadable checkpoint log discarded; starting afresh");
            if let Err(e) = self.store.discard_chunks(&claim.id, &token).await {
                warn!(error = %e, "the old checkpoint log could not be emptied");
            }
        }
        let computed = tokio::task::spawn_blocking(move || {
            let _entered = span.enter();
            let observer = Observer(&compute_flags);
            let cancel = &compute_flags.cancel;
            let mut commit = |step: &ChunkStep| committer.commit(step);
            let had_checkpoint = resume.is_some();
            let mut outcome =
                compute::run_resumable(&job, &pool, &observer, cancel, resume, &mut commit);
            if had_checkpoint && matches!(outcome, Err(ComputeError::Ensemble(_))) {
                warn!("the checkpoint does not belong to this job's settings; starting afresh");
                committer.restart();
                let mut commit = |step: &ChunkStep| committer.commit(step);
                outcome = compute::run_resumable(&job, &pool, &observer, cancel, None, &mut commit);
            }
            (job, outcome)
        })
        .await;
        stop_heartbeat.notify_one();
        let _ = heartbeat.await;

        let finish = match computed {
            Ok((job, Ok(outcome))) => {
                let mut provenance = Provenance::new(&job, b"", &outcome.method, threads);
                provenance.request_sha256 = claim.request_sha256.clone();
                warnings.extend(outcome.warnings);
                let sensitivity = if outcome.sensitivity.is_empty() {
                    Ok(None)
                } else {
                    serde_json::to_string(&outcome.sensitivity).map(Some)
                };
                match (
                    serde_json::to_string(&provenance),
                    serde_json::to_string(&outcome.results),
                    sensitivity,
                    outcome.whatif.to_json(),
                ) {
                    (Ok(provenance), Ok(results), Ok(sensitivity), Ok(whatif)) => {
                        Finish::Succeeded {
                            provenance,
                            results,
                            sensitivity,
                            whatif,
                            warnings,
                        }
                    }
                    (Err(e), ..) | (_, Err(e), ..) | (_, _, Err(e), _) | (.., Err(e)) => {
                        Finish::Failed {
                            error: format!("the results could not be written: {e}"),
                        }
                    }
                }
            }
            Ok((_, Err(ComputeError::Cancelled))) => {
                if flags.lease_lost.load(Ordering::SeqCst) {
                    warn!("lease lost: the run was stopped and left to its new holder");
                    return;
                }
                if flags.user_cancel.load(Ordering::SeqCst) {
                    Finish::Cancelled
                } else {
                    match self.store.requeue(&claim.id, &token).await {
                        Ok(true) => info!("stopped: run put back in the queue to resume later"),
                        Ok(false) => warn!("stopped: the lease was already lost"),
                        Err(e) => error!(error = %e, "cannot put the run back in the queue"),
                    }
                    return;
                }
            }
            Ok((_, Err(e))) => Finish::Failed {
                error: format!("the job could not be computed: {e}"),
            },
            Err(join) => {
                error!(error = %join, "the computation panicked");
                Finish::Failed {
                    error: "internal error while computing".to_owned(),
                }
            }
        };
        self.end(&claim.id, &token, finish).await;
    }
}

/// What the heartbeat, the shutdown and the computation tell each other about one run.
#[derive(Debug, Default)]
struct RunFlags {
    /// Raised to stop the computation at its next check.
    cancel: AtomicBool,
    /// A client asked to cancel.
    user_cancel: AtomicBool,
    /// The lease was taken by another worker.
    lease_lost: AtomicBool,
    /// Replicates done so far.
    done: AtomicU64,
}

/// The checkpoint in a claim's log, or `None` when it is empty or a step cannot be read.
fn read_checkpoint(log: &[String]) -> Option<EnsembleCheckpoint> {
    if log.is_empty() {
        return None;
    }
    let steps: Result<Vec<ChunkStep>, _> = log
        .iter()
        .map(|text| serde_json::from_str::<ChunkStep>(text))
        .collect();
    match steps {
        Ok(steps) => Some(EnsembleCheckpoint { steps }),
        Err(e) => {
            warn!(error = %e, "a checkpoint step cannot be read");
            None
        }
    }
}

/// Commits ensemble chunk steps from the computing thread, through the lease token.
struct Committer {
    runtime: tokio::runtime::Handle,
    store: Store,
    id: String,
    token: String,
    lease: Duration,
    flags: Arc<RunFlags>,
    /// Sequence number of the next step in the run's log.
    next_seq: Cell<u64>,
    /// When the last step was committed (or the computation started).
    last_commit: Cell<Instant>,
}

impl Committer {
    /// Appends `step` to the run's log (with the progress) if this worker still holds the
    /// lease; raises the cancellation flag when the lease is lost or a client asked to cancel.
    fn commit(&self, step: &ChunkStep) {
        let text = match serde_json::to_string(step) {
            Ok(text) => text,
            Err(e) => return error!(error = %e, "cannot serialise the checkpoint step"),
        };
        let done = self.flags.done.load(Ordering::Relaxed);
        let seq = self.next_seq.get();
        let written = self.runtime.block_on(self.store.commit_chunk(
            &self.id,
            &self.token,
            self.lease,
            done,
            seq,
            &text,
        ));
        match written {
            Ok(Some(cancel_requested)) => {
                self.next_seq.set(seq + 1);
                self.count_committed(step.record.replicates);
                if cancel_requested {
                    self.flags.user_cancel.store(true, Ordering::SeqCst);
                    self.flags.cancel.store(true, Ordering::SeqCst);
                }
            }
            Ok(None) => {
                self.flags.lease_lost.store(true, Ordering::SeqCst);
                self.flags.cancel.store(true, Ordering::SeqCst);
            }
            // A step that is not committed cannot be skipped (the log must replay in order):
            // stop here; the run goes back to the queue and resumes after the last step.
            Err(e) => {
                error!(error = %e, "checkpoint step not committed; stopping the run to resume it");
                self.flags.cancel.store(true, Ordering::SeqCst);
            }
        }
    }

    /// Adds the `new` replicates of a committed chunk to the metrics.
    fn count_committed(&self, new: u64) {
        let seconds = self
            .last_commit
            .replace(Instant::now())
            .elapsed()
            .as_secs_f64();
        if new == 0 {
            return;
        }
        metrics::counter!("demefix_ensemble_replicates_total").increment(new);
        if seconds > 0.0 {
            metrics::gauge!("demefix_ensemble_chunk_replicates_per_second")
                .set(new as f64 / seconds);
        }
    }

    /// Empties the run's log (the computation starts afresh).
    fn restart(&self) {
        if let Err(e) = self
            .runtime
            .block_on(self.store.discard_chunks(&self.id, &self.token))
        {
            warn!(error = %e, "the old checkpoint log could not be emptied");
        }
        self.next_seq.set(0);
        self.last_commit.set(Instant::now());
    }
}

struct Observer<'a>(&'a RunFlags);

impl ProgressObserver for Observer<'_> {
    fn on_progress(&self, done: u64, _total: u64) {
        self.0.done.store(done, Ordering::Relaxed);
    }
}

async fn heartbeat(w: Workers, id: String, token: String, flags: Arc<RunFlags>, stop: Arc<Notify>) {
    let mut shutdown = w.shutdown.clone();
    let mut ticker = tokio::time::interval(w.config.heartbeat);
    ticker.tick().await;
    loop {
        if *shutdown.borrow() {
            flags.cancel.store(true, Ordering::SeqCst);
        }
        tokio::select! {
            () = stop.notified() => return,
            _ = ticker.tick() => {}
            _ = shutdown.changed(), if !flags.cancel.load(Ordering::SeqCst) => continue,
        }
        let done = flags.done.load(Ordering::Relaxed);
        match w.store.heartbeat(&id, &token, w.config.lease, done).await {
            Ok(Some(true)) => {
                flags.user_cancel.store(true, Ordering::SeqCst);
                flags.cancel.store(true, Ordering::SeqCst);
            }
            Ok(Some(false)) => {}
            Ok(None) => {
                flags.lease_lost.store(true, Ordering::SeqCst);
                flags.cancel.store(true, Ordering::SeqCst);
            }
            Err(e) => warn!(error = %e, "heartbeat failed; retrying at the next beat"),
        }
    }
}

/// Counts a worker loop as alive while it exists.
struct Alive(Arc<AtomicUsize>);

impl Alive {
    fn new(count: &Arc<AtomicUsize>) -> Self {
        count.fetch_add(1, Ordering::SeqCst);
        Self(count.clone())
    }
}

impl Drop for Alive {
    fn drop(&mut self) {
        self.0.fetch_sub(1, Ordering::SeqCst);
    }
}
