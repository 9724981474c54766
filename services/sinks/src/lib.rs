//! # apportion-sinks
//!
//! Where credit rows, path rows and dead letters go. Every sink takes whole
//! batches and returns only when the batch is durable at the sink, so the
//! service commits its input offsets after the sinks and delivery is at
//! least once. Re-delivery is harmless: rows carry a deterministic
//! `credit_id` / `path_id` that sinks (or their readers) deduplicate on.
//!
//! ## Sinks and layers
//! A sink does one attempt per `write()`. What to do when an attempt fails
//! is a layer around it, in the manner of a middleware stack, so each policy
//! is written once:
//! - [`layers::Retry`]: retries a retryable failure a few times with
//!   exponential backoff, asking the sink to [`Sink::reset`] in between.
//! - [`layers::Spooled`]: when the sink stays unavailable, keeps the batch
//!   in a durable [`spool::Spool`] and answers Ok, so the service goes on;
//!   spooled batches are delivered first once the sink is back.
//! - Pausing (holding the batch uncommitted until the sink takes it) is the
//!   service's outer loop, not a layer: it must also stop the input.
//!
//! ## Layout
//! - [`ndjson`]: rotating NDJSON files, each renamed into place when complete.
//! - [`parquet`]: Parquet files partitioned by date; durable segments per
//!   batch, rolled into larger files by size and age.
//! - [`postgres`]: PostgreSQL tables `credit` and `paths`
//!   (`deploy/warehouse/postgres.sql`), one transaction per batch,
//!   deduplicated on `credit_id` / `path_id`.
//! - [`layers`], [`spool`]: the layers above.
//! - [`atomic`]: the one way files are made durable (temporary name, fsync,
//!   rename, directory fsync).
#![deny(missing_docs)]
#![forbid(unsafe_code)]

pub mod atomic;
pub mod layers;
pub mod ndjson;
pub mod parquet;
pub mod postgres;
pub mod spool;

pub use apportion_contract::{CreditRow, DeadLetter, ErasureRecord, PathRow};

/// One batch of output.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct OutputBatch {
    /// Credit rows.
    pub credit: Vec<CreditRow>,
    /// Closed paths.
    pub paths: Vec<PathRow>,
    /// Rejected input.
    pub dead_letters: Vec<DeadLetter>,
    /// Audit records of erasures.
    pub erasures: Vec<ErasureRecord>,
}

impl OutputBatch {
    /// An empty batch with room for `credit` credit rows and `paths` path
    /// rows (a batch that grows row by row copies itself at every doubling,
    /// each time into memory the kernel has to zero first).
    pub fn with_capacity(credit: usize, paths: usize) -> Self {
        OutputBatch { credit: Vec::with_capacity(credit), paths: Vec::with_capacity(paths), ..Default::default() }
    }

    /// True when there is nothing to write.
    pub fn is_empty(&self) -> bool {
        self.credit.is_empty() && self.paths.is_empty() && self.dead_letters.is_empty() && self.erasures.is_empty()
    }

    /// True when there are credit or path rows (dead letters aside).
    pub fn has_rows(&self) -> bool {
        !self.credit.is_empty() || !self.paths.is_empty()
    }
}

/// Errors of a sink. `retryable` tells the caller whether to retry the same
/// batch (with backoff) or to stop.
#[derive(Debug, thiserror::Error)]
#[error("{sink} sink: {detail}")]
pub struct SinkError {
    /// Sink name.
    pub sink: &'static str,
    /// What went wrong.
    pub detail: String,
    /// Whether retrying the same batch may succeed.
    pub retryable: bool,
}

impl SinkError {
    /// A retryable error.
    pub fn retry(sink: &'static str, detail: impl Into<String>) -> Self {
        SinkError { sink, detail: detail.into(), retryable: true }
    }
    /// A permanent error.
    pub fn fatal(sink: &'static str, detail: impl Into<String>) -> Self {
        SinkError { sink, detail: detail.into(), retryable: false }
    }
}

/// A destination for output batches.
pub trait Sink: Send {
    /// Short fixed name (`kafka`, `file`, `postgres`, `parquet`): a metric label.
    fn name(&self) -> &'static str;
    /// Writes one batch; returns once it is durable at the sink.
    fn write(&mut self, batch: &OutputBatch) -> Result<(), SinkError>;
    /// Finishes open files / connections (shutdown).
    fn close(&mut self) -> Result<(), SinkError>;
    /// Whether the sink stores dead letters (Parquet and PostgreSQL keep
    /// only credit and path rows), so row counts name only what was kept.
    fn keeps_dead_letters(&self) -> bool {
        true
    }
    /// Forgets any session or connection after a failed attempt, so that the
    /// next attempt starts afresh. Sinks without sessions do nothing.
    fn reset(&mut self) {}
}

impl<S: Sink + ?Sized> Sink for Box<S> {
    fn name(&self) -> &'static str {
        (**self).name()
    }
    fn write(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        (**self).write(batch)
    }
    fn close(&mut self) -> Result<(), SinkError> {
        (**self).close()
    }
    fn keeps_dead_letters(&self) -> bool {
        (**self).keeps_dead_letters()
    }
    fn reset(&mut self) {
        (**self).reset()
    }
}

/// What the layers report, for the service's metrics (the sinks crate
/// itself knows nothing of Prometheus).
pub trait Observer: Send + Sync {
    /// An attempt at `sink` failed.
    fn failed(&self, sink: &'static str);
    /// A batch is being tried again at `sink` (after a failure, or from the spool).
    fn retried(&self, sink: &'static str);
    /// True once the service is stopping: layers stop retrying (the batch is
    /// given up uncommitted and delivered again after the restart).
    fn cancelled(&self) -> bool {
        false
    }
    /// When the service is stopping: the moment by which a write in
    /// progress must give up (what is left of the shutdown grace).
    fn deadline(&self) -> Option<std::time::Instant> {
        None
    }
}

/// An observer that ignores everything (tests, tools).
#[derive(Debug, Default, Clone, Copy)]
pub struct NoObserver;

impl Observer for NoObserver {
    fn failed(&self, _: &'static str) {}
    fn retried(&self, _: &'static str) {}
}
