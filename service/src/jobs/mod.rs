//! The worker pool: claim a job from the durable table, run the engine off the async runtime
//! (`spawn_blocking`, at most `workers` at once under a semaphore), renew the lease while it runs, and
//! write the outcome only while the claim still holds.
//!
//! The queue is the open store's ([`Backend`]): SQLite's job table, or PostgreSQL's shared by every
//! replica (claims with `FOR UPDATE SKIP LOCKED`, per-job claim tokens, outcomes written only while
//! the token matches, expired leases reaped by any claim), where an idle pool also wakes on
//! `LISTEN`/`NOTIFY` when any replica queues a job, with polling as the fallback.
//!
//! On shutdown the pool stops claiming, lets running fits finish for a grace period, then cancels the
//! rest and gives their jobs back to the queue (the next start runs them). A worker that dies without
//! shutting down leaves its lease to expire; the next claim after expiry re-runs the job.

pub mod engine;
pub mod handoff;

pub use engine::{CoreEngine, Engine};

use crate::fit::{DcrReading, FitControl, FitError, FitOptions};
use crate::registry::assessment;
use crate::registry::wire::FailureKind;
use crate::settings::Settings;
use crate::store::jobs::Renewal;
use crate::store::{Backend, JobClaim, sha256_hex};
use crate::sweep::{Method, ReadOptions};
use std::collections::HashMap;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};
use tokio::sync::{Notify, Semaphore, watch};
use tokio::task::JoinSet;
use tracing::Instrument;

/// Parses a measurement method as the API spells it.
pub fn parse_method(text: &str) -> Option<Method> {
    serde_json::from_value(serde_json::Value::String(text.to_string())).ok()
}

/// The options the engine runs with: the caller's options, with the upload's DC resistance reading
/// when the options do not carry one.
pub fn effective_options(mut options: FitOptions, dcr_ohm: Option<f64>) -> FitOptions {
    if options.dcr.is_none()
        && let Some(value_ohm) = dcr_ohm
    {
        options.dcr = Some(DcrReading {
            value_ohm,
            sigma_ohm: None,
        });
    }
    options
}

/// Identifies "the same fit of the same file" together with the file's SHA-256 and the part: the
/// canonical effective options and how the file is read (method, Z0).
pub fn duplicate_key(options_json: &str, method: &str, z0_ohm: Option<f64>) -> String {
    let text = serde_json::json!({ "options": options_json, "method": method, "z0_ohm": z0_ohm });
    sha256_hex(text.to_string().as_bytes())
}

/// [`duplicate_key`] of an upload with fixture sweeps: the fixture files' SHA-256 and the topology
/// take part too (the same DUT file compensated differently is a different fit).
pub fn duplicate_key_with_fixture(
    options_json: &str,
    method: &str,
    z0_ohm: Option<f64>,
    fixture: Option<&engine::FixtureFiles<'_>>,
) -> String {
    let Some(fx) = fixture else {
        return duplicate_key(options_json, method, z0_ohm);
    };
    let text = serde_json::json!({
        "options": options_json, "method": method, "z0_ohm": z0_ohm,
        "fixture_open_sha256": sha256_hex(fx.open.bytes),
        "fixture_short_sha256": sha256_hex(fx.short.bytes),
        "fixture_topology": fx.topology.as_str(),
    });
    sha256_hex(text.to_string().as_bytes())
}

/// Knobs of the pool, from [`Settings`].
#[derive(Debug, Clone)]
pub struct PoolSettings {
    pub workers: usize,
    pub lease: Duration,
    pub max_attempts: i64,
    pub poll_interval: Duration,
    pub shutdown_grace: Duration,
    /// How long a finished fit's job row is kept before the pool deletes it.
    pub job_retention: Duration,
}

impl From<&Settings> for PoolSettings {
    fn from(s: &Settings) -> Self {
        PoolSettings {
            workers: s.workers,
            lease: s.lease,
            max_attempts: s.max_attempts,
            poll_interval: s.poll_interval,
            shutdown_grace: s.shutdown_grace,
            job_retention: s.job_retention,
        }
    }
}

/// A cheap handle the HTTP layer uses to wake the pool and to cancel a fit running here.
#[derive(Clone)]
pub struct JobsHandle {
    notify: Arc<Notify>,
    running: Arc<Mutex<HashMap<i64, Arc<AtomicBool>>>>,
    handoff: Arc<handoff::HandOff>,
}

impl JobsHandle {
    /// Leaves the sweep an upload read for its fit `fit_id`, for the worker here that fits it
    /// ([`handoff`]).
    pub fn leave_read_sweep(&self, fit_id: i64, sweep: crate::sweep::Sweep) {
        self.handoff.leave(fit_id, sweep);
    }

    /// New work was queued.
    pub fn wake(&self) {
        self.notify.notify_one();
    }

    /// Flips the cancel flag of a fit running in this process (a fit running elsewhere sees the
    /// stored request at its next lease renewal).
    pub fn cancel_local(&self, fit_id: i64) {
        if let Some(flag) = self.running.lock().expect("running map").get(&fit_id) {
            flag.store(true, Ordering::SeqCst);
        }
    }
}

pub struct Pool {
    store: Backend,
    engine: Arc<dyn Engine>,
    settings: PoolSettings,
    handle: JobsHandle,
}

impl Pool {
    pub fn new(store: Backend, engine: Arc<dyn Engine>, settings: PoolSettings) -> Pool {
        Pool {
            store,
            engine,
            settings,
            handle: JobsHandle {
                notify: Arc::new(Notify::new()),
                running: Arc::new(Mutex::new(HashMap::new())),
                handoff: Arc::new(handoff::HandOff::default()),
            },
        }
    }

    pub fn handle(&self) -> JobsHandle {
        self.handle.clone()
    }

    /// Runs until `stop` turns true, then drains (see the module docs).
    pub async fn run(self, mut stop: watch::Receiver<bool>) {
        // A worker slot is taken only for the fit itself; up to as many jobs again are claimed and
        // loaded ahead, so a slot that frees up never waits for a claim or a read. A job counts
        // against `permits` from its claim until its fit ends (not while its outcome is written).
        let engine_slots = Arc::new(Semaphore::new(self.settings.workers));
        let permits = Arc::new(Semaphore::new(4 * self.settings.workers));
        let (release_tx, release_rx) = watch::channel(false);
        let mut tasks = JoinSet::new();
        // On PostgreSQL, jobs queued by other replicas wake this pool too; polling stays the
        // fallback (and finds expired leases, which announce nothing).
        let mut waker = match self.store.job_waker().await {
            Ok(w) => w,
            Err(e) => {
                tracing::warn!(error = %e, "cannot listen for queued jobs; polling only");
                None
            }
        };
        let mut maintained = Instant::now();
        // Finished jobs are pruned at the first housekeeping, then every PRUNE_INTERVAL (or every
        // retention, when that is shorter).
        let prune_every = PRUNE_INTERVAL.min(self.settings.job_retention);
        let mut pruned: Option<Instant> = None;
        loop {
            if *stop.borrow() {
                break;
            }
            if maintained.elapsed() >= MAINTENANCE_INTERVAL {
                maintained = Instant::now();
                let prune = pruned.is_none_or(|at| at.elapsed() >= prune_every);
                let before = prune.then(|| {
                    let retention_ms =
                        i64::try_from(self.settings.job_retention.as_millis()).unwrap_or(i64::MAX);
                    crate::store::now_ms().saturating_sub(retention_ms)
                });
                match self.store.maintain(before).await {
                    Ok(n) => {
                        if prune {
                            pruned = Some(Instant::now());
                        }
                        if n > 0 {
                            tracing::info!(job_rows = n, "finished jobs pruned");
                        }
                    }
                    Err(e) => tracing::warn!(
                        error = %e,
                        "the store's housekeeping failed; it runs again later"
                    ),
                }
            }
            let first = tokio::select! {
                p = permits.clone().acquire_owned() => p.expect("semaphore is never closed"),
                _ = stop.changed() => break,
            };
            // Every idle worker is filled by one claim transaction.
            let mut free = vec![first];
            while let Ok(p) = permits.clone().try_acquire_owned() {
                free.push(p);
            }
            while tasks.try_join_next().is_some() {}
            match self
                .store
                .claim_jobs(self.settings.lease, self.settings.max_attempts, free.len())
                .await
            {
                Ok(claims) if !claims.is_empty() => {
                    for claim in claims {
                        let permit = free.pop().expect("no more claims than free permits");
                        let job = RunningJob {
                            store: self.store.clone(),
                            engine: self.engine.clone(),
                            settings: self.settings.clone(),
                            handle: self.handle.clone(),
                            release: release_rx.clone(),
                            engine_slots: engine_slots.clone(),
                        };
                        let span = tracing::info_span!(
                            "fit",
                            fit_id = claim.fit_id(),
                            attempt = claim.attempt()
                        );
                        tasks.spawn(async move { job.run(claim, permit).await }.instrument(span));
                    }
                }
                Ok(_) => {
                    drop(free);
                    let poll = self.settings.poll_interval;
                    let announced = async {
                        match waker.as_mut() {
                            Some(w) => {
                                w.wait(poll).await;
                            }
                            None => tokio::time::sleep(poll).await,
                        }
                    };
                    tokio::select! {
                        _ = self.handle.notify.notified() => {}
                        _ = announced => {}
                        _ = stop.changed() => break,
                    }
                }
                Err(e) => {
                    drop(free);
                    tracing::error!(error = %e, "cannot claim a job");
                    tokio::time::sleep(self.settings.poll_interval).await;
                }
            }
        }
        let running = tasks.len();
        if running > 0 {
            tracing::info!(running, "waiting for running fits before shutdown");
        }
        let drained = tokio::time::timeout(self.settings.shutdown_grace, async {
            while tasks.join_next().await.is_some() {}
        })
        .await;
        if drained.is_err() {
            tracing::warn!(
                running = tasks.len(),
                "fits still running after the grace period: releasing their jobs"
            );
            let _ = release_tx.send(true);
            while tasks.join_next().await.is_some() {}
        }
    }
}

struct RunningJob {
    store: Backend,
    engine: Arc<dyn Engine>,
    settings: PoolSettings,
    handle: JobsHandle,
    release: watch::Receiver<bool>,
    /// The worker slots: held while the engine runs.
    engine_slots: Arc<Semaphore>,
}

enum Outcome {
    Report(Box<crate::fit::FitReport>),
    Fit(FitError),
    /// The stored sweep cannot be read as [`job_sweep`] says (kind `unreadable_sweep`).
    Sweep(String),
    Panic,
}

/// The message stored with a fit that stopped on an internal error (the cause goes to the log).
const INTERNAL_FAILURE: &str = "the fit stopped on an internal error";

/// The failure kind stored with a fit the numeric core refused: the one place the core's errors map
/// onto [`FailureKind`]. No wildcard arm, so a new `FitError` variant does not compile until it has
/// a kind. (A sweep that does not read is `unreadable_sweep`, whatever the reader's message; the
/// service's own failures, attempts exhausted and internal errors, are named where they happen.)
pub fn failure_kind(error: &FitError) -> FailureKind {
    match error {
        FitError::TooFewPoints(_) => FailureKind::TooFewPoints,
        FitError::NotAnInductor(_) => FailureKind::NotAnInductor,
        FitError::InvalidOptions(_) => FailureKind::InvalidOptions,
        FitError::Cancelled => FailureKind::Cancelled,
        FitError::NonFinite(_) => FailureKind::NonFinite,
        FitError::NotPassive(_) => FailureKind::NotPassive,
    }
}

impl RunningJob {
    /// Runs one claimed job: waits for a worker slot, fits, gives the slot back and writes the
    /// outcome. `claimed` counts the job among those claimed ahead of a slot; it is given back with
    /// the slot, so jobs still writing their outcome do not hold up the next claims.
    async fn run(mut self, claim: JobClaim, claimed: tokio::sync::OwnedSemaphorePermit) {
        let fit_id = claim.fit_id();
        let input = match self.store.job_input(fit_id).await {
            Ok(i) => i,
            Err(e) => {
                tracing::error!(error = %e, "cannot load the job's sweep");
                return;
            }
        };
        let cancel = Arc::new(AtomicBool::new(false));
        let progress = Arc::new(AtomicU64::new(0f64.to_bits()));
        self.handle
            .running
            .lock()
            .expect("running map")
            .insert(fit_id, cancel.clone());

        let engine = self.engine.clone();
        let control = FitControl {
            cancel: Some(cancel.clone()),
            progress: Some({
                let progress = progress.clone();
                Arc::new(move |p: f64| progress.store(p.to_bits(), Ordering::Relaxed))
            }),
        };
        let follow_up = rational_follow_up(&input);
        // The sweep its upload read, when it was left here; otherwise the stored files are read.
        let handed = self.handle.handoff.take(fit_id);
        let span = tracing::Span::current();
        let slots = self.engine_slots.clone();
        let store = self.store.clone();
        let claim_now = claim.clone();
        let work = async move {
            let _slot = slots.acquire_owned().await;
            // Not waited for: the fit starts now, and the outcome is queued behind this write.
            drop(store.mark_started(&claim_now));
            let started = Instant::now();
            let outcome = tokio::task::spawn_blocking(move || {
                let _entered = span.enter();
                run_engine(engine.as_ref(), &input, handed, &control)
            })
            .await;
            (outcome, started.elapsed())
        };
        let watched = self.supervise(work, &claim, &cancel, &progress).await;
        self.handle
            .running
            .lock()
            .expect("running map")
            .remove(&fit_id);
        drop(claimed);
        let (joined, took) = watched.done;
        let outcome = joined.unwrap_or(Outcome::Panic);
        if watched.lost {
            metrics::counter!("henrybook_fits_total", "outcome" => "lease_lost").increment(1);
            return;
        }
        // The engine's own time (the sweep parsed and fitted), without the wait for a slot.
        let seconds = took.as_secs_f64();
        let written = self
            .settle(&claim, outcome, seconds, watched.releasing, follow_up)
            .await;
        match written {
            Ok(true) => tracing::debug!(seconds, "fit finished"),
            Ok(false) => tracing::warn!("the claim was taken over before the result was written"),
            Err(e) => tracing::error!(error = %e, "cannot write the fit's outcome"),
        }
    }

    /// Waits for `work` while renewing the lease every third of it (with the fit's progress), and
    /// raises `cancel` when a cancel is requested, the lease is lost or the pool releases its jobs.
    async fn supervise<T>(
        &mut self,
        work: impl std::future::Future<Output = T>,
        claim: &JobClaim,
        cancel: &AtomicBool,
        progress: &AtomicU64,
    ) -> Watched<T> {
        tokio::pin!(work);
        let mut ticker =
            tokio::time::interval((self.settings.lease / 3).max(Duration::from_millis(50)));
        ticker.tick().await;
        let mut lost = false;
        let mut releasing = *self.release.borrow();
        if releasing {
            cancel.store(true, Ordering::SeqCst);
        }
        let done = loop {
            tokio::select! {
                done = &mut work => break done,
                _ = ticker.tick() => {
                    let p = f64::from_bits(progress.load(Ordering::Relaxed));
                    match self.store.renew_lease(claim, self.settings.lease, p).await {
                        Ok(Renewal::Held { cancel_requested: true }) => cancel.store(true, Ordering::SeqCst),
                        Ok(Renewal::Held { .. }) => {}
                        Ok(Renewal::Lost) => {
                            tracing::warn!("lease lost to another worker: stopping without writing");
                            lost = true;
                            cancel.store(true, Ordering::SeqCst);
                        }
                        Err(e) => tracing::warn!(error = %e, "cannot renew the lease"),
                    }
                }
                _ = self.release.changed(), if !releasing => {
                    releasing = true;
                    cancel.store(true, Ordering::SeqCst);
                }
            }
        };
        Watched {
            done,
            lost,
            releasing,
        }
    }

    /// Writes the outcome of a fit whose claim still holds (and counts it); a succeeded lumped fit
    /// that misses its data queues its rational follow-up. `Ok(false)`: the claim was taken over.
    async fn settle(
        &self,
        claim: &JobClaim,
        outcome: Outcome,
        seconds: f64,
        releasing: bool,
        follow_up: Option<(f64, String, String)>,
    ) -> crate::store::StoreResult<bool> {
        match outcome {
            Outcome::Report(report) => {
                metrics::histogram!("henrybook_fit_duration_seconds").record(seconds);
                metrics::counter!("henrybook_fits_total", "outcome" => "succeeded").increment(1);
                let rms_weighted = report.quality.rms_weighted;
                let poor = report.assessment.status == crate::fit::FitStatus::Poor;
                let written = self.write_report(claim, report).await;
                if let (Ok(true), Some((limit, options_json, key))) = (&written, &follow_up)
                    && (poor || rms_weighted > *limit)
                {
                    self.queue_follow_up(claim.fit_id(), options_json, key, rms_weighted, poor)
                        .await;
                }
                written
            }
            Outcome::Fit(FitError::Cancelled) if releasing => {
                metrics::counter!("henrybook_fits_total", "outcome" => "released").increment(1);
                self.store.release_job(claim).await
            }
            Outcome::Fit(FitError::Cancelled) => {
                metrics::counter!("henrybook_fits_total", "outcome" => "cancelled").increment(1);
                self.store
                    .complete_unsuccessful(
                        claim,
                        true,
                        FailureKind::Cancelled,
                        "cancelled on request",
                    )
                    .await
            }
            Outcome::Fit(e) => {
                metrics::histogram!("henrybook_fit_duration_seconds").record(seconds);
                metrics::counter!("henrybook_fits_total", "outcome" => "failed").increment(1);
                self.store
                    .complete_unsuccessful(claim, false, failure_kind(&e), &e.to_string())
                    .await
            }
            Outcome::Sweep(text) => {
                metrics::counter!("henrybook_fits_total", "outcome" => "failed").increment(1);
                self.store
                    .complete_unsuccessful(claim, false, FailureKind::UnreadableSweep, &text)
                    .await
            }
            Outcome::Panic => {
                tracing::error!("the engine panicked");
                metrics::counter!("henrybook_fits_total", "outcome" => "failed").increment(1);
                self.store
                    .complete_unsuccessful(claim, false, FailureKind::Internal, INTERNAL_FAILURE)
                    .await
            }
        }
    }

    /// Queues the rational fit of a lumped fit that missed its data, as its next revision.
    async fn queue_follow_up(
        &self,
        fit_id: i64,
        options_json: &str,
        key: &str,
        rms_weighted: f64,
        poor: bool,
    ) {
        match self
            .store
            // One follow-up per finished fit: not held to the request bounds.
            .refit(AUTOMATIC_ACTOR, fit_id, options_json, key, None)
            .await
        {
            Ok(next) => {
                tracing::info!(
                    next_fit_id = next,
                    rms_weighted,
                    poor,
                    "the lumped model misses the data: a rational fit is queued"
                );
                self.handle.wake();
            }
            Err(e) => tracing::error!(error = %e, "cannot queue the rational fit"),
        }
    }
}

/// What [`RunningJob::supervise`] saw: the work's result, whether the lease was lost, and whether
/// the pool was releasing its jobs.
struct Watched<T> {
    done: T,
    lost: bool,
    releasing: bool,
}

impl RunningJob {
    /// Assesses a succeeded report (figures, grid, verdict, drift, JSON) off the async runtime, then
    /// writes it; the writer only stores what is already computed.
    async fn write_report(
        &self,
        claim: &JobClaim,
        report: Box<crate::fit::FitReport>,
    ) -> crate::store::StoreResult<bool> {
        let (basis, baseline_json) = self.store.assessment_basis(claim.fit_id()).await?;
        let assessed = tokio::task::spawn_blocking(move || {
            let a = assessment::assess(&report, basis, baseline_json.as_deref());
            a.map(|a| (report, a))
        })
        .await;
        match assessed {
            Ok(Ok((report, a))) => {
                // A result costs a whole fit: a write the database could not take for the moment
                // (a lost connection, a restart) is tried again before the claim is given up on.
                // Each try writes only while the claim still holds, so a try whose commit did land
                // makes the next answer "taken over" rather than write twice.
                let mut delay = Duration::from_millis(250);
                loop {
                    match self
                        .store
                        .complete_succeeded(claim, (*report).clone(), a.clone())
                        .await
                    {
                        Err(e) if e.is_transient() && delay <= WRITE_RETRY_MAX_DELAY => {
                            tracing::warn!(error = %e, retry_in_s = delay.as_secs_f64(),
                                "the database did not take the fit's result; trying again");
                            tokio::time::sleep(delay).await;
                            delay *= 2;
                        }
                        written => break written,
                    }
                }
            }
            Ok(Err(e)) => Err(e.into()),
            Err(e) => {
                tracing::error!(error = %e, "the assessment of a succeeded fit panicked");
                self.store
                    .complete_unsuccessful(claim, false, FailureKind::Internal, INTERNAL_FAILURE)
                    .await
            }
        }
    }
}

/// How often the pool runs the store's housekeeping ([`crate::store::backend::Backend::maintain`]).
const MAINTENANCE_INTERVAL: Duration = Duration::from_secs(1);

/// How often the housekeeping deletes the job rows of fits finished longer than the retention ago.
const PRUNE_INTERVAL: Duration = Duration::from_secs(60);

/// The longest wait between tries of a result write the database could not take for the moment
/// (tries after 0.25, 0.5, 1 and 2 s: under 4 s in all; a claim whose lease ran out meanwhile and
/// was taken over writes nothing).
const WRITE_RETRY_MAX_DELAY: Duration = Duration::from_secs(2);

/// Who the audit trail names for work the service queues by itself.
pub const AUTOMATIC_ACTOR: &str = "henrybook (automatic)";

/// For a lumped fit whose options ask for a rational fallback: the weighted-RMS limit, and the options
/// (JSON) and duplicate key of the rational fit to queue when the lumped result exceeds it or is
/// assessed `poor` (the model does not describe the data within their uncertainty).
fn rational_follow_up(input: &crate::store::sweeps::JobInput) -> Option<(f64, String, String)> {
    let mut options: FitOptions = serde_json::from_str(&input.options_json).ok()?;
    let limit = options.rational_fallback_above_rms_weighted?;
    if options.family != crate::fit::ModelFamily::Lumped || !limit.is_finite() {
        return None;
    }
    options.family = crate::fit::ModelFamily::Rational;
    options.rational_fallback_above_rms_weighted = None;
    let json = serde_json::to_string(&options).ok()?;
    let key = job_key(input, &json);
    Some((limit, json, key))
}

/// The stored fixture sweeps of a job, as the engine reads them.
fn stored_fixture(
    input: &crate::store::sweeps::JobInput,
) -> Result<Option<engine::FixtureFiles<'_>>, String> {
    match (&input.fixture_open, &input.fixture_short) {
        (None, None) => Ok(None),
        (Some(open), Some(short)) => {
            let text = input.fixture_topology.as_deref().unwrap_or("approximate");
            let topology = engine::FixtureTopology::parse(text)
                .ok_or_else(|| format!("unknown fixture topology {text}"))?;
            Ok(Some(engine::FixtureFiles {
                open: engine::InputFile {
                    name: &open.name,
                    bytes: &open.bytes,
                },
                short: engine::InputFile {
                    name: &short.name,
                    bytes: &short.bytes,
                },
                topology,
            }))
        }
        _ => Err("the sweep has only one of its two fixture files".to_string()),
    }
}

/// The DUT sweep a stored job implies: its file read by its method, compensated by its fixture sweeps
/// when it has them. The error text names the file (and line) that cannot be used.
pub fn job_sweep(
    engine: &dyn Engine,
    input: &crate::store::sweeps::JobInput,
) -> Result<crate::sweep::Sweep, String> {
    let method = parse_method(&input.method)
        .ok_or_else(|| format!("unknown measurement method {}", input.method))?;
    let read = ReadOptions {
        method: Some(method),
        z0_ohm: input.z0_ohm,
        ..ReadOptions::default()
    };
    let fixture = stored_fixture(input)?;
    let file = engine::InputFile {
        name: &input.file.name,
        bytes: &input.file.bytes,
    };
    engine::read_input(engine, file, fixture, &read)
        .map_err(|e| format!("the sweep cannot be read: {e}"))
}

/// [`duplicate_key_with_fixture`] of a stored job with other options (a refit).
pub fn job_key(input: &crate::store::sweeps::JobInput, options_json: &str) -> String {
    let fixture = stored_fixture(input).ok().flatten();
    duplicate_key_with_fixture(options_json, &input.method, input.z0_ohm, fixture.as_ref())
}

/// Fits a job: `handed` is the sweep its upload read (the same as reading the stored files again),
/// when the upload left it here.
fn run_engine(
    engine: &dyn Engine,
    input: &crate::store::sweeps::JobInput,
    handed: Option<crate::sweep::Sweep>,
    control: &FitControl,
) -> Outcome {
    let sweep = match handed.map_or_else(|| job_sweep(engine, input), Ok) {
        Ok(s) => s,
        Err(text) => return Outcome::Sweep(text),
    };
    let options: FitOptions = match serde_json::from_str(&input.options_json) {
        Ok(o) => o,
        Err(e) => return Outcome::Fit(FitError::InvalidOptions(e.to_string())),
    };
    // Uploads and refits validate before storing; options stored by an older build (or edited in the
    // database) fail their own fit with the option named, and never reach the engine.
    if let Err(e) = options.validate() {
        return Outcome::Fit(e);
    }
    match engine.fit(&sweep, &options, control) {
        Ok(r) => Outcome::Report(Box::new(r)),
        Err(e) => Outcome::Fit(e),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_core_error_maps_to_its_own_failure_kind() {
        let cases = [
            (FitError::TooFewPoints(5), "too_few_points"),
            (
                FitError::NotAnInductor("capacitive".into()),
                "not_an_inductor",
            ),
            (
                FitError::InvalidOptions("max_sections".into()),
                "invalid_options",
            ),
            (FitError::Cancelled, "cancelled"),
            (FitError::NonFinite("NaN".into()), "non_finite"),
            (FitError::NotPassive("bound".into()), "not_passive"),
        ];
        for (error, name) in &cases {
            let kind = failure_kind(error);
            assert_eq!(kind.as_str(), *name, "{error}");
            assert_eq!(
                serde_json::to_value(kind).unwrap(),
                serde_json::json!(name),
                "the JSON name is the stored name"
            );
        }
        // The kind follows the variant, never the message.
        assert_eq!(
            failure_kind(&FitError::NotAnInductor("too few points".into())),
            FailureKind::NotAnInductor
        );
    }

    #[test]
    fn failure_kind_names_are_distinct_and_read_back() {
        let names: std::collections::HashSet<_> =
            FailureKind::ALL.iter().map(|k| k.as_str()).collect();
        assert_eq!(names.len(), FailureKind::ALL.len());
        for kind in FailureKind::ALL {
            assert_eq!(FailureKind::parse(kind.as_str()), Some(kind));
        }
        assert_eq!(FailureKind::parse("Not_An_Inductor"), None);
        assert_eq!(FailureKind::parse(""), None);
    }

    #[test]
    fn the_migrations_allow_exactly_the_failure_kinds() {
        let kinds: Vec<&str> = FailureKind::ALL.iter().map(|k| k.as_str()).collect();
        // SQLite: one trigger for inserts, one for updates; PostgreSQL: one function both call.
        for (sql, expected_lists) in [
            (
                include_str!("../../../migrations/sqlite/0010_fit_error_kind.sql"),
                2,
            ),
            (
                include_str!("../../../migrations/postgres/0010_fit_error_kind.sql"),
                1,
            ),
        ] {
            let lists: Vec<Vec<&str>> = sql
                .split("NEW.error_kind NOT IN (")
                .skip(1)
                .map(|rest| {
                    let list = rest.split_once(')').expect("the list is closed").0;
                    list.split(',')
                        .map(|n| n.trim().trim_matches('\''))
                        .collect()
                })
                .collect();
            assert_eq!(lists.len(), expected_lists);
            for list in lists {
                assert_eq!(list, kinds);
            }
        }
    }
}
