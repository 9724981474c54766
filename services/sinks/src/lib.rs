//! # apportion-sinks
//!
//! Where credit rows, path rows and dead letters go. Every sink takes whole
//! batches and returns only when the batch is durable at the sink, so the
//! service commits its input offsets after the sinks and delivery is at
//! least once. Re-delivery is harmless: rows carry a deterministic
//! `credit_id` / `path_id` that sinks (or their readers) deduplicate on.
//!
//! ## Layout
//! - [`ndjson`]: rotating NDJSON files, each renamed into place when complete.
//! - [`parquet`]: Parquet files partitioned by date; durable segments per
//!   batch, rolled into larger files by size and age.
//! - [`postgres`]: PostgreSQL tables `credit` and `paths`
//!   (`deploy/warehouse/postgres.sql`), one transaction per batch,
//!   deduplicated on `credit_id` / `path_id`.
#![deny(missing_docs)]
#![forbid(unsafe_code)]

pub mod ndjson;
pub mod parquet;
pub mod postgres;

use apportion_engine::{CreditRow, PathRow};
use serde::{Deserialize, Serialize};

/// An input event that was not processed, and why. It never carries the
/// event itself (which may hold a raw user id): the source position says
/// where to find it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DeadLetter {
    /// Machine-readable reason (see `RejectReason::code`).
    pub reason: String,
    /// Human-readable detail.
    pub detail: String,
    /// Source: a topic name, `http` or a file path.
    pub source: String,
    /// Source partition (Kafka).
    pub partition: Option<i32>,
    /// Source offset (Kafka) or sequence number (embedded).
    pub offset: Option<i64>,
    /// The event's `event_id`, when it could be read.
    pub event_id: Option<String>,
    /// RFC 3339 time the service received the event.
    pub received_at: String,
}

/// One batch of output.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct OutputBatch {
    /// Credit rows.
    pub credit: Vec<CreditRow>,
    /// Closed paths.
    pub paths: Vec<PathRow>,
    /// Rejected input.
    pub dead_letters: Vec<DeadLetter>,
}

impl OutputBatch {
    /// True when there is nothing to write.
    pub fn is_empty(&self) -> bool {
        self.credit.is_empty() && self.paths.is_empty() && self.dead_letters.is_empty()
    }
}

/// Errors of a sink. `retryable` tells the service whether to retry the same
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
}
