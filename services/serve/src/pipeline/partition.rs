//! One open input partition: its store, clock, path statistics and offsets,
//! and how they are opened from and committed to the store.

use std::time::Instant;

use anyhow::{Context, Result};
use apportion_engine::datadriven::PathStats;
use apportion_store::{Clock, PartitionStore, Store};

use crate::source::{PartId, Payload};

/// The state of one open partition.
pub struct PartState {
    /// Journeys, duplicate detection, offsets (sled behind a cache).
    pub store: PartitionStore,
    /// How its payloads are encoded.
    pub payload: Payload,
    /// Largest event time applied and the watermark.
    pub clock: Clock,
    /// Path statistics of the partition's closed paths.
    pub stats: PathStats,
    /// Statistics changed since the last commit.
    pub stats_dirty: bool,
    /// When the last message arrived (idle detection).
    pub last_input: Instant,
    /// The watermark right after the last input.
    pub wm_at_input: i64,
    /// The committed input offset.
    pub committed: Option<i64>,
    /// Offset of the last message applied in the open batch.
    pub pending_offset: Option<i64>,
    /// Batches committed since opening.
    pub batches: u64,
}

impl PartState {
    /// Opens the partition's committed state.
    pub fn open(store: &Store, id: &PartId, payload: Payload, cache_bytes: usize, markov_order: usize) -> Result<Self> {
        let name = id.store_name();
        let part = store.partition(&name, cache_bytes)?;
        let committed = part.offset(&name).with_context(|| format!("reading the offset of partition {name}"))?;
        let clock = part.clock().with_context(|| format!("reading the clock of partition {name}"))?;
        let stats =
            part.stats(markov_order).with_context(|| format!("reading the path statistics of partition {name}"))?;
        Ok(PartState {
            store: part,
            payload,
            clock,
            stats,
            stats_dirty: false,
            last_input: Instant::now(),
            wm_at_input: clock.watermark,
            committed,
            pending_offset: None,
            batches: 0,
        })
    }

    /// Commits state, statistics, clock and the offset in one atomic batch;
    /// every 100 batches forgets event ids older than `dedupe_horizon_ms`
    /// before the watermark.
    pub fn commit(&mut self, id: &PartId, dedupe_horizon_ms: i64) -> Result<()> {
        if let Some(o) = self.pending_offset.take() {
            self.store.stage_offset(&id.store_name(), o);
            self.committed = Some(o);
        }
        self.store.stage_clock(&self.clock);
        if self.stats_dirty {
            self.store.stage_stats(&self.stats);
            self.stats_dirty = false;
        }
        self.store.commit(true)?;
        self.batches += 1;
        if self.batches % 100 == 0 && self.clock.watermark != i64::MIN {
            self.store.prune_seen(self.clock.watermark.saturating_sub(dedupe_horizon_ms))?;
        }
        Ok(())
    }
}
