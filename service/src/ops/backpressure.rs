//! Bounds on what the service takes in, shared by HTTP and gRPC: queued fits per part and in all, upload
//! bytes being received or read at once, and how many uploads are read (parsed, CPU) at once.
//!
//! The checks here run before a request is read in full (cheap refusals); an upload checks again
//! inside its write, so uploads arriving together cannot overshoot the bounds.
//!
//! Past a part's bound the answer is 429 (`throttled`; gRPC RESOURCE_EXHAUSTED), past a service-wide
//! bound 503 (`overloaded`; gRPC UNAVAILABLE), both with `Retry-After`, and nothing is stored. Refusing
//! at once keeps the queue short enough that its fits run within minutes, and the memory of uploads in
//! flight bounded; uploads wait for one of a few reading slots, so parsing them never takes more CPU
//! than the worker pool leaves (fits keep running during an upload flood).

use super::error::{ErrorKind, OpsError, OpsResult};
use crate::settings::Settings;
use crate::store::Backend;
use crate::store::jobs::PartRef;
use std::sync::Arc;
use tokio::sync::{OwnedSemaphorePermit, Semaphore};

/// Seconds a client is told to wait when the fit queue is full (a fit takes about a second).
pub const QUEUE_RETRY_AFTER_S: u64 = 10;
/// Seconds a client is told to wait when too many upload bytes are in flight (uploads take seconds).
pub const BYTES_RETRY_AFTER_S: u64 = 2;

#[derive(Debug)]
pub struct Backpressure {
    /// Upload bytes in flight, in KiB (a semaphore counts at most u32 permits at a time).
    upload_kib: Arc<Semaphore>,
    upload_kib_total: u32,
    /// Uploads being read (parsed, checked, hashed) at once.
    readers: Arc<Semaphore>,
    max_queued_fits: i64,
    max_queued_fits_per_part: i64,
}

fn kib(bytes: u64) -> u32 {
    bytes.div_ceil(1024).min(u32::MAX as u64) as u32
}

impl Backpressure {
    pub fn new(s: &Settings) -> Backpressure {
        let total = kib(s.max_upload_bytes_in_flight as u64).max(1);
        Backpressure {
            upload_kib: Arc::new(Semaphore::new(total as usize)),
            upload_kib_total: total,
            readers: Arc::new(Semaphore::new(s.upload_readers.max(1))),
            max_queued_fits: s.max_queued_fits,
            max_queued_fits_per_part: s.max_queued_fits_per_part,
        }
    }

    /// Reserves `bytes` of the upload bytes in flight, or refuses with 503 when they are taken.
    pub fn reserve_upload_bytes(&self, bytes: u64) -> OpsResult<OwnedSemaphorePermit> {
        let want = kib(bytes).clamp(1, self.upload_kib_total);
        self.upload_kib
            .clone()
            .try_acquire_many_owned(want)
            .map_err(|_| {
                metrics::counter!("henrybook_refused_total", "bound" => "upload_bytes").increment(1);
                OpsError::busy(
                    ErrorKind::Overloaded,
                    format!(
                        "the service is receiving as many upload bytes as it takes at once ({} MiB); \
                         try again shortly",
                        self.upload_kib_total / 1024
                    ),
                    BYTES_RETRY_AFTER_S,
                )
            })
    }

    /// A slot to read an upload in (waits for one).
    pub async fn reading_slot(&self) -> OwnedSemaphorePermit {
        self.readers
            .clone()
            .acquire_owned()
            .await
            .expect("the semaphore is never closed")
    }

    /// The queue bounds, for the check inside an upload's write.
    pub fn queue_bounds(&self) -> crate::store::sweeps::QueueBounds {
        crate::store::sweeps::QueueBounds {
            all: self.max_queued_fits,
            part: self.max_queued_fits_per_part,
        }
    }

    /// Refuses when the queue is full: 503 in all, 429 for the part.
    pub async fn check_queue(&self, store: &Backend, part: PartRef<'_>) -> OpsResult<()> {
        let depth = store.queue_depth(part).await?;
        if depth.all >= self.max_queued_fits {
            metrics::counter!("henrybook_refused_total", "bound" => "queue").increment(1);
            return Err(OpsError::busy(
                ErrorKind::Overloaded,
                format!(
                    "{} fits are queued or running, the most this service takes; try again later",
                    depth.all
                ),
                QUEUE_RETRY_AFTER_S,
            ));
        }
        if depth.part >= self.max_queued_fits_per_part {
            metrics::counter!("henrybook_refused_total", "bound" => "part_queue").increment(1);
            return Err(OpsError::busy(
                ErrorKind::Throttled,
                format!(
                    "{} fits of this part are queued or running, the most one part may have; try \
                     again later",
                    depth.part
                ),
                QUEUE_RETRY_AFTER_S,
            ));
        }
        Ok(())
    }
}
