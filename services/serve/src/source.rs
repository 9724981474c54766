//! Sources of input batches, and what the pipeline needs to know of a
//! message: its partition, offset and bytes.
//!
//! A [`Source`] hands the run loop batches of raw messages per partition and
//! hears back when a batch is durable. The Kafka source, the embedded HTTP
//! and file sources and [`MemorySource`] (tests and the demo) implement it.

use std::time::{Duration, Instant};

use anyhow::Result;
use apportion_contract::Rejection;

use crate::config::Format;
use crate::metrics::Metrics;
use crate::pipeline::Pipeline;

/// One input partition: a topic partition, or an embedded source.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct PartId {
    /// Topic name, `http` or `file`.
    pub source: String,
    /// Partition number (0 for embedded sources).
    pub partition: i32,
}

impl PartId {
    /// Builds a partition id.
    pub fn new(source: &str, partition: i32) -> Self {
        PartId { source: source.to_string(), partition }
    }

    /// The name of the partition's state in the store (`<source>/<n>`).
    pub fn store_name(&self) -> String {
        format!("{}/{}", self.source, self.partition)
    }
}

/// How a partition's payloads are encoded.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Payload {
    /// A contract event (JSON or protobuf) with a raw `user_id`.
    Event(Format),
    /// An event of the internal repartition topic: JSON whose `user_id` is
    /// already the pseudonymous user key (hex), so no raw id crosses it.
    Pseudonymized,
}

/// One raw input message.
#[derive(Debug, Clone)]
pub struct InMsg {
    /// Offset in its partition (or sequence number).
    pub offset: i64,
    /// The bytes.
    pub payload: Vec<u8>,
    /// When the service received it (latency metric).
    pub arrived: Instant,
    /// Processing time of the message, epoch ms: the Kafka record's
    /// timestamp, else when the service read it. Future-dated events are
    /// judged against it (`max_future_skew`).
    pub timestamp_ms: i64,
}

/// What became of one message.
#[derive(Debug, Clone, PartialEq)]
pub enum MsgStatus {
    /// Applied.
    Accepted,
    /// Its event id was seen before; dropped.
    Duplicate,
    /// Sent to the dead-letter output.
    Rejected(Rejection),
    /// Already applied before a restart (offset at or below the committed one).
    AlreadyApplied,
    /// Not an event: progress of an input partition (repartition topic).
    Progress,
    /// Valid, but its `consent.measurement` is false: counted and dropped
    /// (contract: Input events, Consent).
    WithoutConsent,
}

/// A source of input batches.
pub trait Source: Send {
    /// Waits up to `wait` for up to `max` messages; opens and closes
    /// partitions on the pipeline as assignment changes.
    fn poll(&mut self, pipeline: &mut Pipeline, max: usize, wait: Duration) -> Result<Vec<(PartId, Vec<InMsg>)>>;
    /// The batch is durable (sinks written, state committed).
    fn committed(&mut self, pipeline: &Pipeline, statuses: Vec<(PartId, Vec<MsgStatus>)>) -> Result<()>;
    /// Refreshes lag gauges.
    fn update_lag(&mut self, _metrics: &Metrics) {}
    /// The changelog the pipeline publishes commits to, and the gate the
    /// source's revocations wait on (Kafka with `kafka.changelog`).
    fn changelog(
        &self,
    ) -> Option<(std::sync::Arc<dyn crate::pipeline::changelog::Changelog>, crate::pipeline::changelog::CommitGate)>
    {
        None
    }
    /// Total consumer lag, if known.
    fn lag(&self) -> Option<u64> {
        None
    }
    /// The consumer group the last batch was read in (Kafka: the consumer's
    /// group metadata, taken right after the poll), committed with the
    /// batch's input offsets in its transaction (exactly-once delivery).
    fn group(&self) -> Option<crate::pipeline::changelog::GroupToken> {
        None
    }
    /// After a rollback (a batch whose transaction was refused, the group
    /// having moved on since it was read): hands over again, from each
    /// open partition's committed offset, what was handed over since. A
    /// source that cannot says so (the loop then stops with the error).
    fn rewind(&mut self, _pipeline: &Pipeline) -> Result<()> {
        anyhow::bail!("this source cannot read its input again")
    }
    /// True once the source has its partitions.
    fn ready(&self) -> bool;
    /// True when the partition has no more input to hand over right now
    /// (read up to its end). Only a caught-up partition can become idle
    /// (`idle_timeout`); a partition with a backlog never does.
    fn caught_up(&self, _part: &PartId) -> bool {
        false
    }
    /// True when a finite source has handed over everything (the demo, the
    /// tests): the run loop then closes every journey, as at the end of a
    /// replay, and stops.
    fn exhausted(&self) -> bool {
        false
    }
    /// Shutdown.
    fn close(&mut self, _pipeline: &mut Pipeline) -> Result<()> {
        Ok(())
    }
}

/// A finite, in-memory source of one partition: the given payloads in
/// batches of at most `chunk`, offsets 1, 2, ... (the demo, the tests).
pub struct MemorySource {
    part: PartId,
    payload: Payload,
    /// Every payload; message `i` has offset `i + 1`.
    payloads: Vec<Vec<u8>>,
    chunk: usize,
    /// The offset of the next message handed over.
    next_offset: i64,
    opened: bool,
    /// Statuses of every committed message, in order (for tests).
    pub statuses: Vec<MsgStatus>,
}

impl MemorySource {
    /// A source of `payloads` on partition `part`, `chunk` messages per poll.
    pub fn new(part: PartId, payload: Payload, payloads: impl IntoIterator<Item = Vec<u8>>, chunk: usize) -> Self {
        MemorySource {
            part,
            payload,
            payloads: payloads.into_iter().collect(),
            chunk: chunk.max(1),
            next_offset: 1,
            opened: false,
            statuses: Vec::new(),
        }
    }

    /// Every payload handed over (since the last rewind).
    fn drained(&self) -> bool {
        self.next_offset > self.payloads.len() as i64
    }
}

impl Source for MemorySource {
    fn poll(&mut self, pipeline: &mut Pipeline, max: usize, _wait: Duration) -> Result<Vec<(PartId, Vec<InMsg>)>> {
        if !self.opened {
            let committed = pipeline.open_partition(&self.part, self.payload)?;
            // Resume after what the store already holds (a reopened store).
            self.next_offset = self.next_offset.max(committed.map_or(1, |c| c + 1));
            self.opened = true;
        }
        let from = (self.next_offset - 1).clamp(0, self.payloads.len() as i64) as usize;
        let n = self.chunk.min(max).min(self.payloads.len() - from);
        if n == 0 {
            return Ok(Vec::new());
        }
        let now = Instant::now();
        let wall = crate::pipeline::now_ms();
        let msgs = self.payloads[from..from + n]
            .iter()
            .zip(self.next_offset..)
            .map(|(payload, offset)| InMsg { offset, payload: payload.clone(), arrived: now, timestamp_ms: wall })
            .collect();
        self.next_offset += n as i64;
        Ok(vec![(self.part.clone(), msgs)])
    }

    fn committed(&mut self, _pipeline: &Pipeline, statuses: Vec<(PartId, Vec<MsgStatus>)>) -> Result<()> {
        for (_, st) in statuses {
            self.statuses.extend(st);
        }
        Ok(())
    }

    fn rewind(&mut self, pipeline: &Pipeline) -> Result<()> {
        let committed = pipeline.committed_offsets().into_iter().find(|(id, _)| *id == self.part).map(|(_, o)| o);
        self.next_offset = committed.map_or(1, |c| c + 1);
        Ok(())
    }

    fn ready(&self) -> bool {
        true
    }

    fn exhausted(&self) -> bool {
        self.opened && self.drained()
    }

    fn caught_up(&self, part: &PartId) -> bool {
        *part == self.part && self.drained()
    }
}

/// Logs a recurring error (a consumer, a followed file) without flooding the log: the first at once, then
/// at most one line every 10 seconds with the number of errors in between.
#[derive(Debug, Default)]
pub(crate) struct ErrorLog {
    last: Option<std::time::Instant>,
    suppressed: u64,
}

impl ErrorLog {
    pub(crate) fn report(&mut self, what: &str, e: &dyn std::fmt::Display) {
        if self.last.is_none_or(|t| t.elapsed() > std::time::Duration::from_secs(10)) {
            tracing::warn!(error = %e, suppressed = self.suppressed, "{what}");
            self.last = Some(std::time::Instant::now());
            self.suppressed = 0;
        } else {
            self.suppressed += 1;
        }
    }
}
