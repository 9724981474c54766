//! One open input partition: its store, clock, path statistics, offsets,
//! recorded decisions and model snapshot, and how they are opened from and
//! committed to the store.

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::sync::Arc;
use std::time::Instant;

use anyhow::{Context, Result};
use apportion_engine::datadriven::PathStats;
use apportion_engine::registry::ModelPlan;
use apportion_store::{ChangeSet, Clock, Decision, PartitionStore, Store};

use crate::kafka::repartition::SourceClocks;
use crate::refit::Snapshot;
use crate::source::{PartId, Payload};

/// Decisions that depended on processing time, by the offset they apply at
/// (see [`Decision`]): replayed as they were when the same messages come
/// again.
#[derive(Debug, Default)]
pub struct Decisions {
    /// Offsets of events rejected as future-dated.
    pub future: BTreeSet<i64>,
    /// Watermark advances by processing time, after the message at the key.
    pub advances: BTreeMap<i64, i64>,
    /// Ends of batches whose output was written before their commit, and
    /// the snapshot it was credited with (see [`Decision::OutputWritten`]).
    pub written: BTreeMap<i64, String>,
    /// Recorded in memory, not yet durable.
    pub unsaved: Vec<Decision>,
}

impl Decisions {
    fn load(list: Vec<Decision>) -> Self {
        let mut d = Decisions::default();
        for x in list {
            d.add(x);
        }
        d
    }

    fn add(&mut self, x: Decision) {
        match x {
            Decision::FutureRejected { offset } => {
                self.future.insert(offset);
            }
            Decision::Advance { after_offset, watermark } => {
                let w = self.advances.entry(after_offset).or_insert(watermark);
                *w = (*w).max(watermark);
            }
            Decision::OutputWritten { through_offset, snapshot } => {
                self.written.insert(through_offset, snapshot);
            }
        }
    }

    /// True when output was written for messages after `offset` with the
    /// committed snapshot: a commit at `offset` keeps that snapshot.
    pub fn holds_snapshot_at(&self, offset: Option<i64>) -> bool {
        match (self.written.last_key_value(), offset) {
            (Some((&w, _)), Some(o)) => w > o,
            (Some(_), None) => true,
            (None, _) => false,
        }
    }

    /// Records a new decision (durable at the next
    /// [`PartState::persist_decisions`]).
    pub fn record(&mut self, x: Decision) {
        self.add(x.clone());
        self.unsaved.push(x);
    }

    /// The snapshot the output written after the last commit was credited
    /// with, if any was (it is the one the partition committed with, but
    /// for a partition that never committed).
    pub fn written_with(&self) -> Option<&str> {
        self.written.first_key_value().map(|(_, v)| v.as_str())
    }

    /// Removes and returns the advances at or before `offset`, in order.
    pub fn take_advances_upto(&mut self, offset: i64) -> Vec<i64> {
        let later = self.advances.split_off(&(offset.saturating_add(1)));
        let due = std::mem::replace(&mut self.advances, later);
        due.into_values().collect()
    }
}

/// How a partition records its decisions, by where its commits go.
#[derive(Debug, Clone, Copy)]
pub struct Recording {
    /// The batch's output is written before its commit and not taken back
    /// when the commit fails (at-least-once delivery): output marks are
    /// recorded.
    pub mark_output: bool,
    /// Decisions are flushed to disk when recorded: without a changelog.
    /// A changelog has them before the output that depends on them is
    /// written (at least once: [`crate::pipeline::PreparedBatch::publish_decisions`];
    /// exactly once: in the batch's transaction, which takes that output
    /// back with them), and a partition that crashed is restored from it.
    pub flush: bool,
}

impl Recording {
    /// No changelog: decisions durable in the store, output marks recorded.
    pub const LOCAL: Recording = Recording { mark_output: true, flush: true };
}

/// A caught-up partition's idle clock: since when it has had nothing to
/// read, and its watermark then.
#[derive(Debug, Clone, Copy)]
pub struct Idle {
    /// When the partition was last seen with input still to read (or a
    /// stall ended).
    pub since: Instant,
    /// The watermark at that moment.
    pub watermark: i64,
}

/// The state of one open partition.
pub struct PartState {
    /// Journeys, duplicate detection, offsets (sled behind a cache).
    pub store: PartitionStore,
    /// How its payloads are encoded.
    pub payload: Payload,
    /// Largest event time applied and the watermark.
    pub clock: Clock,
    /// Path statistics of the partition's closed paths (kept and committed
    /// only with a data-driven model; changes are tracked, so a commit
    /// writes only the counters they touched).
    pub stats: PathStats,
    /// Whether `stats` are kept (a data-driven model is configured).
    pub keep_stats: bool,
    /// The committed input offset.
    pub committed: Option<i64>,
    /// Offset of the last message applied in the open batch.
    pub pending_offset: Option<i64>,
    /// Batches committed since opening.
    pub batches: u64,
    /// Decisions recorded for offsets not committed yet.
    pub decisions: Decisions,
    /// Set while the partition is caught up with its input.
    pub idle: Option<Idle>,
    /// The models this partition credits with.
    pub snapshot: Arc<Snapshot>,
    /// A snapshot to switch to at the next commit (or the first one after
    /// the output already written with the current one, see
    /// [`Decisions::holds_snapshot_at`]).
    pub adopt: Option<Arc<Snapshot>>,
    /// Data-driven credit was emitted since the last commit.
    pub credited: bool,
    /// A source position to commit with the next offset.
    pub source_position: Option<Vec<u8>>,
    /// Repartitioned input: the progress of every input partition.
    pub sources: SourceClocks,
    /// When each pending conversion of this partition was read (for the
    /// latency histogram); an entry leaves when the conversion is credited
    /// or erased, or with the partition.
    pub arrivals: HashMap<String, Instant>,
    /// Decisions written to the store and not yet in a commit (a changelog
    /// publishes them with the next one).
    pub unpublished: ChangeSet,
    /// The clock and snapshot version as last staged: a commit stages them
    /// only when they changed, so a partition with nothing new commits
    /// (and publishes) nothing.
    staged_clock: Clock,
    staged_snapshot: Option<String>,
}

impl PartState {
    /// Opens the partition's committed state; `snapshot` is the snapshot it
    /// committed with (or the current one for a new partition). With a
    /// data-driven model (`plan`), the path statistics are read with the
    /// plan's channel cap; without one, stored statistics (of an earlier
    /// configuration) are deleted at the next commit.
    pub fn open(
        store: &Store,
        id: &PartId,
        payload: Payload,
        cache_bytes: usize,
        plan: &ModelPlan,
        snapshot: impl FnOnce(Option<&str>) -> Result<Arc<Snapshot>>,
    ) -> Result<Self> {
        let name = id.store_name();
        let mut part = store.partition(&name, cache_bytes)?;
        let committed = part.offset(&name).with_context(|| format!("reading the offset of partition {name}"))?;
        let clock = part.clock().with_context(|| format!("reading the clock of partition {name}"))?;
        let keep_stats = plan.data_driven();
        let stats = if keep_stats {
            let mut s = part
                .stats(plan.markov_order)
                .with_context(|| format!("reading the path statistics of partition {name}"))?;
            // Tracked before the cap applies: a lowered cap rewrites them.
            s.track_changes();
            s.with_max_channels(plan.max_channels)
        } else {
            if part.stage_drop_stats()? {
                tracing::info!(
                    partition = %name,
                    "no data-driven model is configured: the stored path statistics are deleted at the next commit"
                );
            }
            plan.empty_stats()
        };
        let decisions =
            Decisions::load(part.decisions().with_context(|| format!("reading the decisions of partition {name}"))?);
        let active = part.active_snapshot().with_context(|| format!("reading the snapshot of partition {name}"))?;
        // Output written after the last commit names the snapshot it was
        // credited with: its redelivery credits with the same one.
        let snapshot = snapshot(decisions.written_with().or(active.as_deref()))?;
        let sources = match payload {
            Payload::Pseudonymized => match part.source_position()? {
                Some(b) => serde_json::from_slice(&b)
                    .with_context(|| format!("the source clocks of partition {name} are damaged"))?,
                None => SourceClocks::default(),
            },
            Payload::Event(_) => SourceClocks::default(),
        };
        Ok(PartState {
            store: part,
            payload,
            clock,
            stats,
            keep_stats,
            committed,
            pending_offset: None,
            batches: 0,
            decisions,
            idle: None,
            snapshot,
            adopt: None,
            credited: false,
            source_position: None,
            sources,
            arrivals: HashMap::new(),
            unpublished: ChangeSet::default(),
            staged_clock: clock,
            staged_snapshot: active,
        })
    }

    /// The offset of the last message applied (in the open batch, else the
    /// committed one).
    pub fn last_offset(&self) -> Option<i64> {
        self.pending_offset.or(self.committed)
    }

    /// Writes the recorded decisions to the store, durably when `flush`
    /// (see [`Recording`]).
    pub fn persist_decisions(&mut self, flush: bool) -> Result<()> {
        if !self.decisions.unsaved.is_empty() {
            let written = self.store.record_decisions(&self.decisions.unsaved, flush)?;
            self.unpublished.extend(written);
            self.decisions.unsaved.clear();
        }
        Ok(())
    }

    /// Commits state, statistics, clock, the offset and the active snapshot
    /// in one atomic batch, forgetting decisions the committed state already
    /// reflects, and the removal of remembered event ids older than
    /// `dedupe_horizon_ms` before the watermark (the store prunes once
    /// enough have accumulated). The batch is applied, not yet durable: the
    /// caller flushes the store.
    pub fn commit(&mut self, id: &PartId, dedupe_horizon_ms: i64) -> Result<()> {
        let prepared = self.prepare_commit(id, dedupe_horizon_ms, Recording::LOCAL)?;
        self.apply_commit(prepared)
    }

    /// The first half of [`PartState::commit`]: stages and collects the
    /// commit without writing it (see [`PartitionStore::prepare`]); events
    /// applied before [`PartState::apply_commit`] belong to the next one.
    /// With `rec.mark_output`, when the batch credited with a data-driven
    /// model, the end of the batch is recorded
    /// ([`Decision::OutputWritten`]), so that a redelivery keeps the
    /// snapshot up to there.
    pub fn prepare_commit(&mut self, id: &PartId, dedupe_horizon_ms: i64, rec: Recording) -> Result<PreparedPart> {
        if std::mem::take(&mut self.credited) && rec.mark_output {
            if let (Some(o), Some(v)) = (self.pending_offset, self.snapshot.version()) {
                self.decisions.record(Decision::OutputWritten { through_offset: o, snapshot: v.to_string() });
            }
        }
        self.persist_decisions(rec.flush)?;
        let offset = self.pending_offset.take();
        // Output already written with the current snapshot for messages
        // after this commit (a redelivery cut into other batches): the
        // switch waits until the commit passes them.
        let hold = self.decisions.holds_snapshot_at(offset.or(self.committed));
        if let Some(o) = offset {
            self.store.stage_offset(&id.store_name(), o);
        }
        if let Some(c) = offset.or(self.committed) {
            self.store.stage_forget_decisions(c)?;
            self.decisions.future = self.decisions.future.split_off(&(c.saturating_add(1)));
            self.decisions.written = self.decisions.written.split_off(&(c.saturating_add(1)));
        }
        if self.clock != self.staged_clock {
            self.store.stage_clock(&self.clock);
            self.staged_clock = self.clock;
        }
        if self.keep_stats {
            // Only the counters this batch changed (nothing when none did).
            self.store.stage_stats(&mut self.stats)?;
        }
        if !hold {
            if let Some(s) = self.adopt.take() {
                self.snapshot = s;
            }
        }
        if let Some(v) = self.snapshot.version() {
            if self.staged_snapshot.as_deref() != Some(v) {
                self.store.stage_active_snapshot(v);
                self.staged_snapshot = Some(v.to_string());
            }
        }
        if let Some(b) = self.source_position.take() {
            self.store.stage_source_position(b);
        }
        if self.clock.watermark != i64::MIN {
            self.store.prune_seen(self.clock.watermark.saturating_sub(dedupe_horizon_ms))?;
        }
        let decisions = std::mem::take(&mut self.unpublished);
        Ok(PreparedPart {
            store: self.store.prepare(),
            offset,
            through: offset.or(self.committed),
            decisions,
            decisions_published: false,
        })
    }

    /// The second half of [`PartState::commit`]: writes a prepared commit
    /// (not flushed here: the caller flushes the store once for every
    /// partition it commits) and moves the committed offset.
    pub fn apply_commit(&mut self, mut prepared: PreparedPart) -> Result<()> {
        // Written already when the sink thread wrote the batch.
        prepared.store.write()?;
        self.store.applied(prepared.store)?;
        if let Some(o) = prepared.offset {
            self.committed = Some(o);
        }
        self.batches += 1;
        Ok(())
    }
}

/// A partition's commit, collected and not yet written.
pub struct PreparedPart {
    store: apportion_store::Prepared,
    offset: Option<i64>,
    /// The offset of the last message the commit covers (its new offset,
    /// else the one committed before).
    through: Option<i64>,
    /// Decisions recorded since the last commit (already in the store).
    decisions: ChangeSet,
    /// The decisions were published ahead of the batch's output
    /// ([`PreparedPart::early_decisions`]).
    decisions_published: bool,
}

impl PreparedPart {
    /// What its changelog publishes, in order: the decisions recorded since
    /// the last commit (unless published already), then the commit's writes.
    pub fn changes(&self) -> Vec<&ChangeSet> {
        match self.decisions_published {
            false => vec![&self.decisions, self.store.changes()],
            true => vec![self.store.changes()],
        }
    }

    /// The offset of the last message the commit covers, if any.
    pub fn through_offset(&self) -> Option<i64> {
        self.through
    }

    /// True when the commit writes nothing.
    pub fn is_empty(&self) -> bool {
        self.changes().iter().all(|c| c.is_empty())
    }

    /// The decisions to publish before the batch's output is written (at
    /// least once: the output stays when the commit fails, and the
    /// partition's next owner must make the same decisions); none when
    /// there are none or they were published.
    pub fn early_decisions(&self) -> Option<&ChangeSet> {
        (!self.decisions_published && !self.decisions.is_empty()).then_some(&self.decisions)
    }

    /// The decisions are in the changelog.
    pub fn decisions_published(&mut self) {
        self.decisions_published = true;
    }

    /// Records, with the commit, the changelog offset it was published at.
    pub fn set_changelog_offset(&mut self, offset: i64) {
        self.store.set_changelog_offset(offset);
    }

    /// Writes the partition's commit to sled (not flushed); any thread.
    pub fn write(&mut self) -> Result<()> {
        Ok(self.store.write()?)
    }
}
