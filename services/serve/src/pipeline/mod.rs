//! The synchronous heart of `serve`: per-partition journey state,
//! watermarks, duplicate and late handling, credit, and the model snapshot.
//!
//! Sources hand it batches of raw messages per partition; it returns what
//! to write (an [`OutputBatch`]) and a status per message. Nothing here
//! talks to Kafka or HTTP, so the same pipeline runs behind the Kafka
//! source, the embedded sources, the demo and the unit tests below.
//! Durability order (at least once): sinks first, then
//! [`Pipeline::commit`] writes each partition's state, statistics, clock and
//! input offset in one sled batch.
//!
//! - [`decode`]: bytes to events; what can be read of rejected ones.
//! - [`policy`]: the decisions about time (late events, idle partitions).
//! - [`emit`]: effects to rows, statistics and counters.
//! - [`partition`]: one partition's state, opened from and committed to the store.

pub mod decode;
pub mod emit;
pub mod partition;
pub mod policy;

use std::collections::{BTreeMap, HashMap};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use anyhow::{Context, Result};
use apportion_contract::time::format_ms;
use apportion_contract::{EventKind, RejectReason, Rejection};
use apportion_engine::datadriven::PathStats;
use apportion_engine::replay::event_id_digest;
use apportion_engine::{Effect, JourneyEvent, Model, Processor, Pseudonymizer};
use apportion_sinks::OutputBatch;
use apportion_store::Store;

use crate::config::Config;
use crate::metrics::Metrics;
use crate::refit::Refit;
use crate::source::{InMsg, MsgStatus, PartId, Payload};
use partition::PartState;
use policy::Lateness;

/// Processing time, epoch ms.
pub fn now_ms() -> i64 {
    SystemTime::now().duration_since(UNIX_EPOCH).map(|d| d.as_millis() as i64).unwrap_or(0)
}

/// The pipeline.
pub struct Pipeline {
    cfg: Config,
    pseudo: Pseudonymizer,
    processor: Processor,
    store: Store,
    parts: BTreeMap<PartId, PartState>,
    refit: Refit,
    arrivals: HashMap<String, Instant>,
    metrics: Metrics,
}

impl Pipeline {
    /// Opens the pipeline over `store`.
    pub fn new(cfg: Config, pseudo: Pseudonymizer, store: Store, metrics: Metrics) -> Result<Self> {
        let refit = Refit::new(cfg.model_plan(), cfg.refit_interval.ms(), metrics.clone());
        Ok(Pipeline {
            processor: Processor::new(cfg.rules()),
            cfg,
            pseudo,
            store,
            parts: BTreeMap::new(),
            refit,
            arrivals: HashMap::new(),
            metrics,
        })
    }

    /// The configuration.
    pub fn config(&self) -> &Config {
        &self.cfg
    }

    /// Current models.
    pub fn models(&self) -> &[Box<dyn Model>] {
        self.refit.models()
    }

    /// The current snapshot as JSON for the read-only model endpoint: every
    /// model's name and version, and for the data-driven ones the fitted
    /// weights (Shapley value per channel in the game over all channels,
    /// Markov conversion probability and removal effect per channel).
    pub fn models_json(&self) -> serde_json::Value {
        self.refit.json().clone()
    }

    /// Opens a partition's state (on assignment); returns its committed offset.
    pub fn open_partition(&mut self, id: &PartId, payload: Payload) -> Result<Option<i64>> {
        if let Some(p) = self.parts.get(id) {
            return Ok(p.committed);
        }
        let part = PartState::open(&self.store, id, payload, self.cfg.cache_bytes, self.cfg.markov_order)?;
        let committed = part.committed;
        self.parts.insert(id.clone(), part);
        Ok(committed)
    }

    /// Commits and closes a partition's state (on revocation).
    pub fn close_partition(&mut self, id: &PartId) -> Result<()> {
        if let Some(p) = self.parts.get_mut(id) {
            p.commit(id, self.cfg.dedupe_horizon.ms())?;
        }
        self.parts.remove(id);
        self.metrics.watermark_lag.remove_label_values(&[&id.source, &id.partition.to_string()]).ok();
        Ok(())
    }

    /// The watermark of an open partition.
    pub fn watermark(&self, id: &PartId) -> Option<i64> {
        self.parts.get(id).map(|p| p.clock.watermark)
    }

    /// Applies one batch of a partition's messages; appends output to `out`.
    pub fn process(&mut self, id: &PartId, msgs: &[InMsg], out: &mut OutputBatch) -> Result<Vec<MsgStatus>> {
        let payload = self.parts.get(id).context("partition not open")?.payload;
        let mut statuses = Vec::with_capacity(msgs.len());
        let mut effects: Vec<Effect> = Vec::new();
        let received_at = now_ms();
        for m in msgs {
            let decoded = decode::decode(payload, &m.payload, self.cfg.max_event_bytes);
            let part = self.parts.get_mut(id).expect("checked above");
            if part.committed.is_some_and(|c| m.offset <= c) {
                statuses.push(MsgStatus::AlreadyApplied);
                continue;
            }
            part.pending_offset = Some(part.pending_offset.map_or(m.offset, |o| o.max(m.offset)));
            part.last_input = m.arrived;
            let (mut ev, key) = match decoded {
                Ok(v) => v,
                Err(r) => {
                    let (kind, event_id) = decode::sniff(payload, &m.payload);
                    self.metrics.events_consumed.with_label_values(&[kind, "rejected"]).inc();
                    self.metrics.events_rejected.with_label_values(&[r.reason.code()]).inc();
                    out.dead_letters.push(emit::dead_letter(id, m.offset, &r, event_id, received_at));
                    statuses.push(MsgStatus::Rejected(r));
                    continue;
                }
            };
            let kind = ev.kind.as_str();
            let key = key.unwrap_or_else(|| self.pseudo.key_for(&ev.user_id));
            ev.user_id.clear();
            if ev.kind != EventKind::Erase && !part.store.mark_seen(event_id_digest(&ev.event_id), ev.timestamp_ms)? {
                self.metrics.events_consumed.with_label_values(&[kind, "duplicate"]).inc();
                statuses.push(MsgStatus::Duplicate);
                continue;
            }
            let mut outcome = "accepted";
            match policy::judge(ev.timestamp_ms, part.clock.watermark, self.cfg.late_policy) {
                Lateness::OnTime => {}
                Lateness::DeadLetter => {
                    let r = Rejection::new(
                        RejectReason::Late,
                        format!(
                            "event time {} is before the partition watermark {}",
                            format_ms(ev.timestamp_ms),
                            format_ms(part.clock.watermark)
                        ),
                    );
                    self.metrics.events_consumed.with_label_values(&[kind, "late_dropped"]).inc();
                    self.metrics.events_late.with_label_values(&["dropped"]).inc();
                    self.metrics.events_rejected.with_label_values(&["late"]).inc();
                    out.dead_letters.push(emit::dead_letter(id, m.offset, &r, Some(ev.event_id.clone()), received_at));
                    statuses.push(MsgStatus::Rejected(r));
                    continue;
                }
                Lateness::Apply => {
                    self.metrics.events_late.with_label_values(&["applied"]).inc();
                    outcome = "late_applied";
                }
            }
            self.metrics.events_consumed.with_label_values(&[kind, outcome]).inc();
            if ev.kind == EventKind::Conversion {
                self.arrivals.insert(ev.event_id.clone(), m.arrived);
            }
            part.clock.max_ts = part.clock.max_ts.max(ev.timestamp_ms);
            let seq = m.offset.max(0) as u64;
            let wm = part.clock.watermark;
            effects.extend(self.processor.apply(&mut part.store, JourneyEvent::from_event(ev, key, seq), wm)?);
            statuses.push(MsgStatus::Accepted);
        }
        // Move the watermark: max event time - allowed lateness.
        let part = self.parts.get_mut(id).expect("checked above");
        let wm = policy::watermark_after_input(part.clock.watermark, part.clock.max_ts, self.cfg.allowed_lateness.ms());
        if wm > part.clock.watermark {
            part.clock.watermark = wm;
            effects.extend(self.processor.advance(&mut part.store, wm)?);
        }
        part.wm_at_input = part.clock.watermark;
        self.emit(id, &effects, out);
        Ok(statuses)
    }

    /// Advances idle partitions by processing time (after `idle_timeout`
    /// without input, event time is assumed to move with the clock).
    pub fn tick(&mut self, now: Instant, out: &mut OutputBatch) -> Result<()> {
        let idle = self.cfg.idle_timeout.ms().max(0);
        let ids: Vec<PartId> = self.parts.keys().cloned().collect();
        for id in ids {
            let part = self.parts.get_mut(&id).expect("listed");
            let quiet = now.saturating_duration_since(part.last_input).as_millis() as i64;
            let Some(wm) = policy::idle_watermark(part.clock.watermark, part.wm_at_input, quiet, idle) else {
                continue;
            };
            part.clock.watermark = wm;
            let effects = self.processor.advance(&mut part.store, wm)?;
            if part.pending_offset.is_none() {
                part.pending_offset = part.committed;
            }
            self.emit(&id, &effects, out);
        }
        Ok(())
    }

    fn emit(&mut self, id: &PartId, effects: &[Effect], out: &mut OutputBatch) {
        let part = self.parts.get_mut(id).expect("open partition");
        if emit::emit(effects, self.refit.models(), &mut part.stats, &mut self.arrivals, &self.metrics, out) {
            part.stats_dirty = true;
        }
    }

    /// Commits every partition: state, statistics, clock and offsets,
    /// each partition in one atomic batch. Call after the sinks have the
    /// batch's output.
    pub fn commit(&mut self) -> Result<()> {
        let horizon = self.cfg.dedupe_horizon.ms();
        for (id, p) in self.parts.iter_mut() {
            p.commit(id, horizon)?;
        }
        self.update_gauges();
        Ok(())
    }

    /// Drops uncommitted changes of every partition (a batch whose output
    /// could not be written) by reopening them from the store; the source
    /// must re-deliver from the committed offsets.
    pub fn rollback(&mut self) -> Result<()> {
        let ids: Vec<(PartId, Payload)> = self.parts.iter().map(|(k, v)| (k.clone(), v.payload)).collect();
        self.parts.clear();
        for (id, payload) in ids {
            self.open_partition(&id, payload)?;
        }
        Ok(())
    }

    /// Committed offsets per partition.
    pub fn committed_offsets(&self) -> Vec<(PartId, i64)> {
        self.parts.iter().filter_map(|(k, v)| v.committed.map(|o| (k.clone(), o))).collect()
    }

    /// Refits the data-driven models when `refit_interval` has passed.
    /// Returns true when a model version changed.
    pub fn maybe_refit(&mut self) -> bool {
        if self.refit.due() {
            self.refit_now()
        } else {
            false
        }
    }

    /// Refits now from the statistics of every open partition. Returns true
    /// when a model version changed.
    pub fn refit_now(&mut self) -> bool {
        let mut all = PathStats::new(self.cfg.markov_order);
        for p in self.parts.values() {
            all.try_merge(&p.stats).expect("partition statistics share the configured markov_order");
        }
        self.refit.refit(&all)
    }

    /// Updates store gauges.
    pub fn update_gauges(&self) {
        let open: u64 = self.parts.values().map(|p| p.store.open_journeys()).sum();
        self.metrics.journeys_open.set(open as i64);
        self.metrics.store_size.set(self.store.size_on_disk() as i64);
        let now = now_ms();
        for (id, p) in &self.parts {
            if p.clock.watermark != i64::MIN {
                self.metrics
                    .watermark_lag
                    .with_label_values(&[&id.source, &id.partition.to_string()])
                    .set((now - p.clock.watermark) as f64 / 1000.0);
            }
        }
    }

    /// Makes the store durable (shutdown).
    pub fn flush(&mut self) -> Result<()> {
        self.commit()?;
        self.store.flush()?;
        Ok(())
    }

    /// End of a finite input (the demo, tests): moves every partition's
    /// watermark to the end of time, which credits every pending conversion
    /// and closes every open journey, as replay does at the end of its input.
    pub fn drain(&mut self, out: &mut OutputBatch) -> Result<()> {
        let ids: Vec<PartId> = self.parts.keys().cloned().collect();
        for id in ids {
            let part = self.parts.get_mut(&id).expect("listed");
            part.clock.watermark = i64::MAX;
            let effects = self.processor.advance(&mut part.store, i64::MAX)?;
            self.emit(&id, &effects, out);
        }
        Ok(())
    }

    /// Time after which an idle partition advances (for callers that wait).
    pub fn idle_timeout(&self) -> Duration {
        self.cfg.idle_timeout.to_std()
    }
}
