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

pub mod changelog;
pub mod decode;
pub mod emit;
pub mod partition;
pub mod policy;
pub mod shared_stats;

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use anyhow::{Context, Result};
use apportion_contract::time::format_ms;
use apportion_contract::{EventKind, RejectReason, Rejection};
use apportion_engine::replay::dedupe_digest;
use apportion_engine::{Effect, JourneyEvent, Model, Processor, Pseudonymizer};
use apportion_sinks::OutputBatch;
use apportion_store::Store;

use crate::config::Config;
use crate::kafka::repartition;
use crate::metrics::Metrics;
use crate::refit::Refit;
use crate::source::{InMsg, MsgStatus, PartId, Payload};
use apportion_store::Decision;
use changelog::{Changelog, CommitGate, GateTicket, GroupToken};
use partition::{Idle, PartState};
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
    metrics: Metrics,
    hot: crate::metrics::HotSeries,
    state_scan: crate::state_scan::StateScan,
    /// A commit is prepared and not yet applied (its output is being
    /// written): partitions revoked meanwhile close once it is applied.
    prepared: bool,
    /// Partitions revoked while a commit was prepared.
    closing: Vec<PartId>,
    /// Where commits are published before the store writes them, and the
    /// gate that counts the commits being written.
    changelog: Option<(Arc<dyn Changelog>, CommitGate)>,
    /// With a data-driven model and instances that share their path
    /// statistics: the refit rounds (they replace `refit_interval`'s own
    /// schedule).
    rounds: Option<shared_stats::Rounds>,
}

/// Every open partition's commit, collected by [`Pipeline::prepare_commit`]
/// and written by [`Pipeline::apply_commit`].
pub struct PreparedBatch {
    parts: Vec<(PartId, partition::PreparedPart)>,
    store: Store,
    durable: bool,
    changelog: Option<Arc<dyn Changelog>>,
    published: bool,
    /// Counted as being written until dropped.
    ticket: Option<GateTicket>,
    /// The consumer group the batch was read in ([`PreparedBatch::set_group`]).
    group: Option<GroupToken>,
}

impl PreparedBatch {
    /// Writes every partition's commit to sled and flushes it: the state
    /// and offsets durable. Any thread (the sink thread does it right after
    /// the sinks have the batch's output); [`Pipeline::apply_commit`]
    /// finishes it on the pipeline's.
    /// With a changelog, every partition's commit is published there first
    /// (a [`changelog::PublishError`] when that fails: nothing is written
    /// to the store, and writing again publishes again).
    pub fn write(&mut self) -> Result<()> {
        if let (Some(log), false) = (&self.changelog, self.published) {
            // A partition with nothing new publishes nothing.
            let written: Vec<&(PartId, partition::PreparedPart)> =
                self.parts.iter().filter(|(_, p)| !p.is_empty()).collect();
            let sets: Vec<(&PartId, Vec<&apportion_store::ChangeSet>)> =
                written.iter().map(|(id, p)| (id, p.changes())).collect();
            let transactional = log.transactional();
            if !sets.is_empty() || transactional {
                // Every partition the commit writes, at the offset it
                // covers (a partition with changes and no new message too:
                // its next owner waits for this transaction all the same).
                let input = changelog::InputPositions {
                    offsets: written.iter().filter_map(|(id, p)| p.through_offset().map(|o| (id, o))).collect(),
                    group: self.group.as_ref(),
                };
                let offsets = log.publish_batch(&sets, &input)?;
                for ((_, p), o) in self.parts.iter_mut().filter(|(_, p)| !p.is_empty()).zip(offsets) {
                    p.set_changelog_offset(o);
                }
            }
            self.published = true;
        }
        for (_, p) in self.parts.iter_mut() {
            p.write()?;
        }
        self.store.flush()?;
        self.durable = true;
        self.release();
        Ok(())
    }

    /// With a changelog outside a Kafka transaction (at-least-once), publishes
    /// the decisions recorded for the batch (a future-dated rejection, an
    /// idle advance, the end of output written with a data-driven snapshot)
    /// as a commit of their own. Call before the batch's output is written:
    /// if the commit never follows, the partition's next owner, restored
    /// from the changelog, makes the same decisions for the same messages
    /// (docs/contract.md, "Determinism"). A [`changelog::PublishError`]
    /// when it fails (nothing is written yet: call again).
    pub fn publish_decisions(&mut self) -> Result<()> {
        let Some(log) = self.changelog.as_ref().filter(|l| !l.transactional()) else { return Ok(()) };
        let sets: Vec<(&PartId, Vec<&apportion_store::ChangeSet>)> =
            self.parts.iter().filter_map(|(id, p)| p.early_decisions().map(|d| (id, vec![d]))).collect();
        if sets.is_empty() {
            return Ok(());
        }
        log.publish(&sets)?;
        for (_, p) in self.parts.iter_mut() {
            p.decisions_published();
        }
        Ok(())
    }

    /// The consumer group the batch was read in (the source's
    /// [`crate::source::Source::group`] at the batch's poll): with Kafka
    /// transactions, the batch's input offsets are committed with it.
    pub fn set_group(&mut self, group: Option<GroupToken>) {
        self.group = group;
    }

    /// No longer counted as being written (the sink thread is done with
    /// it, written or not: a revocation need not wait for it).
    pub fn release(&mut self) {
        self.ticket = None;
    }
}

impl Pipeline {
    /// Opens the pipeline over `store`.
    pub fn new(cfg: Config, pseudo: Pseudonymizer, store: Store, metrics: Metrics) -> Result<Self> {
        let refit = Refit::new(cfg.model_plan(), cfg.refit_interval.ms(), metrics.clone());
        let scan_every = (cfg.state_scan_interval.ms() > 0).then(|| cfg.state_scan_interval.to_std());
        let state_scan = crate::state_scan::StateScan::new(store.clone(), scan_every, metrics.clone());
        Ok(Pipeline {
            state_scan,
            processor: Processor::new(cfg.rules()),
            cfg,
            pseudo,
            store,
            parts: BTreeMap::new(),
            refit,
            hot: crate::metrics::HotSeries::new(&metrics),
            metrics,
            prepared: false,
            closing: Vec::new(),
            changelog: None,
            rounds: None,
        })
    }

    /// Fits the data-driven models on the statistics of every input
    /// partition of the group, shared through `exchange` in refit rounds
    /// ([`shared_stats`]), instead of on this instance's partitions alone.
    /// Without a data-driven model there is nothing to share: ignored.
    pub fn set_stats_exchange(&mut self, exchange: Box<dyn shared_stats::StatsExchange>) {
        if self.cfg.model_plan().data_driven() {
            // Each round publishes and flushes: at least a second apart.
            let interval = self.cfg.refit_interval.ms().max(shared_stats::MIN_ROUND_MS);
            self.rounds =
                Some(shared_stats::Rounds::new(exchange, interval, shared_stats::Rounds::default_wait(interval)));
        }
    }

    /// Publishes every commit to `changelog` before the store writes it;
    /// `gate` counts the commits being written (a revocation waits for
    /// them). A revoked partition's changes since its last commit are then
    /// dropped, not committed: its new owner restores the last commit from
    /// the changelog and reads the rest again.
    pub fn set_changelog(&mut self, changelog: Arc<dyn Changelog>, gate: CommitGate) {
        self.changelog = Some((changelog, gate));
    }

    /// True when partition `id` is open.
    pub fn is_open(&self, id: &PartId) -> bool {
        self.parts.contains_key(id)
    }

    /// The store.
    pub fn store(&self) -> &Store {
        &self.store
    }

    /// The configuration.
    pub fn config(&self) -> &Config {
        &self.cfg
    }

    /// The models of the current snapshot.
    pub fn models(&self) -> &[Box<dyn Model>] {
        self.refit.current().models()
    }

    /// The current snapshot as JSON for the read-only model endpoint: every
    /// model's name and version, and for the data-driven ones the fitted
    /// weights (Shapley value per channel in the game over all channels,
    /// Markov conversion probability and removal effect per channel).
    pub fn models_json(&self) -> serde_json::Value {
        self.refit.current().json().clone()
    }

    /// Opens a partition's state (on assignment); returns its committed offset.
    pub fn open_partition(&mut self, id: &PartId, payload: Payload) -> Result<Option<i64>> {
        if let Some(p) = self.parts.get(id) {
            // Revoked and assigned again before its close took effect.
            self.closing.retain(|c| c != id);
            return Ok(p.committed);
        }
        let (store, refit, rounds) = (&self.store, &mut self.refit, &mut self.rounds);
        let plan = self.cfg.model_plan();
        let held = || rounds.as_mut().map(|r| r.held_rounds(&plan.empty_stats())).unwrap_or_default();
        let part =
            PartState::open(store, id, payload, self.cfg.cache_bytes, &plan, |v| refit.snapshot_for(store, v, held))?;
        let committed = part.committed;
        self.parts.insert(id.clone(), part);
        Ok(committed)
    }

    /// Commits and closes a partition's state (on revocation).
    pub fn close_partition(&mut self, id: &PartId) -> Result<()> {
        if self.prepared && self.parts.contains_key(id) {
            // Its prepared commit is written first (apply_commit closes it).
            if !self.closing.contains(id) {
                self.closing.push(id.clone());
            }
            return Ok(());
        }
        if self.changelog.is_some() {
            // Its next owner (maybe another instance, maybe already
            // restoring) has the last commit from the changelog; a later one
            // published now could land after that owner's own.
            tracing::info!(partition = %id.store_name(), "partition closed as of its last commit");
        } else if let Some(p) = self.parts.get_mut(id) {
            p.commit(id, self.cfg.dedupe_horizon.ms())?;
            self.store.flush()?;
        }
        self.forget_partition(id);
        Ok(())
    }

    fn forget_partition(&mut self, id: &PartId) {
        self.parts.remove(id);
        self.metrics.watermark_lag.remove_label_values(&[&id.source, &id.partition.to_string()]).ok();
    }

    /// Conversions of an open partition read and not yet credited or
    /// erased (their arrival times wait for the latency histogram).
    pub fn pending_arrivals(&self, id: &PartId) -> usize {
        self.parts.get(id).map_or(0, |p| p.arrivals.len())
    }

    /// The watermark of an open partition.
    pub fn watermark(&self, id: &PartId) -> Option<i64> {
        self.parts.get(id).map(|p| p.clock.watermark)
    }

    /// Applies the recorded advances of a partition that are due after the
    /// message at `offset` (every recorded advance for `None`: those a
    /// reopened partition committed before it made them durable).
    fn replay_advances(&mut self, id: &PartId, offset: Option<i64>, out: &mut OutputBatch) -> Result<()> {
        let part = self.parts.get_mut(id).expect("open partition");
        let upto = match offset.or(part.committed) {
            Some(o) => o,
            None => return Ok(()),
        };
        let mut effects = Vec::new();
        for w in part.decisions.take_advances_upto(upto) {
            if w > part.clock.watermark {
                part.clock.watermark = w;
                effects.extend(self.processor.advance(&mut part.store, w)?);
            }
        }
        if !effects.is_empty() {
            self.emit(id, &effects, out);
        }
        Ok(())
    }

    /// Applies one batch of a partition's messages; appends output to `out`.
    ///
    /// Every message is judged and applied against the watermark as it is
    /// after the messages before it, and the watermark moves after each
    /// message: the output is the same however the messages are cut into
    /// batches (docs/contract.md, "Determinism").
    pub fn process(&mut self, id: &PartId, msgs: &[InMsg], out: &mut OutputBatch) -> Result<Vec<MsgStatus>> {
        let payload = self.parts.get(id).context("partition not open")?.payload;
        // Advances recorded at or before the committed offset (a reopened
        // partition) come before any new message.
        self.replay_advances(id, None, out)?;
        let mut statuses = Vec::with_capacity(msgs.len());
        let received_at = now_ms();
        let skew = self.cfg.max_future_skew.ms();
        let lateness = self.cfg.allowed_lateness.ms();
        for m in msgs {
            let part = self.parts.get_mut(id).expect("checked above");
            if part.committed.is_some_and(|c| m.offset <= c) {
                statuses.push(MsgStatus::AlreadyApplied);
                continue;
            }
            part.pending_offset = Some(part.pending_offset.map_or(m.offset, |o| o.max(m.offset)));
            part.idle = None;
            let status = self.process_one(id, payload, m, received_at, skew, lateness, out)?;
            statuses.push(status);
            self.replay_advances(id, Some(m.offset), out)?;
        }
        let part = self.parts.get_mut(id).expect("checked above");
        if part.pending_offset.is_some() {
            part.idle = None;
        }
        if payload == Payload::Pseudonymized && !part.sources.0.is_empty() {
            // Committed with the offset: the progress of the input partitions.
            part.source_position = Some(serde_json::to_vec(&part.sources).expect("clocks serialize"));
        }
        Ok(statuses)
    }

    #[allow(clippy::too_many_arguments)]
    fn process_one(
        &mut self,
        id: &PartId,
        payload: Payload,
        m: &InMsg,
        received_at: i64,
        skew: i64,
        lateness: i64,
        out: &mut OutputBatch,
    ) -> Result<MsgStatus> {
        if payload == Payload::Pseudonymized {
            if let Some(c) = repartition::read_progress(&m.payload) {
                self.take_progress(id, &c, lateness, out)?;
                return Ok(MsgStatus::Progress);
            }
        }
        let decoded = decode::decode(payload, &m.payload, self.cfg.max_event_bytes);
        let (mut ev, key) = match decoded {
            Ok(v) => v,
            Err(r) => {
                let (kind, event_id) = decode::sniff(payload, &m.payload, self.cfg.max_event_bytes);
                self.metrics.events_consumed.with_label_values(&[kind, "rejected"]).inc();
                self.metrics.events_rejected.with_label_values(&[r.reason.code()]).inc();
                out.dead_letters.push(emit::dead_letter(id, m.offset, &r, event_id, received_at));
                return Ok(MsgStatus::Rejected(r));
            }
        };
        let kind = ev.kind.as_str();
        if ev.without_consent() {
            self.metrics.events_without_consent.with_label_values(&[kind]).inc();
            return Ok(MsgStatus::WithoutConsent);
        }
        let part = self.parts.get_mut(id).expect("open partition");
        // Future-dated: judged against the message's processing time, or as
        // recorded when the same message came before.
        let recorded = part.decisions.future.contains(&m.offset);
        if recorded || policy::too_far_ahead(ev.timestamp_ms, m.timestamp_ms, skew) {
            if !recorded {
                part.decisions.record(Decision::FutureRejected { offset: m.offset });
            }
            let r = Rejection::new(
                RejectReason::FutureTimestamp,
                format!(
                    "event time {} is more than max_future_skew ({}) ahead of processing time",
                    format_ms(ev.timestamp_ms),
                    self.cfg.max_future_skew,
                ),
            );
            self.metrics.events_consumed.with_label_values(&[kind, "rejected"]).inc();
            self.metrics.events_rejected.with_label_values(&[r.reason.code()]).inc();
            out.dead_letters.push(emit::dead_letter(id, m.offset, &r, Some(ev.event_id.clone()), received_at));
            return Ok(MsgStatus::Rejected(r));
        }
        let key = key.unwrap_or_else(|| self.pseudo.key_of(&ev));
        ev.user_id.clear();
        // Remembered for dedupe_horizon past the later of its event time and
        // the watermark it arrived at (a late event too), so whether an id is
        // a duplicate depends only on the message sequence.
        // An erase without an event id is known by its user and time, so a
        // re-sent copy is a duplicate too (contract: Journey rules, Erase).
        let wm = part.clock.watermark;
        if !part.store.mark_seen(
            dedupe_digest(ev.kind, &ev.event_id, &key.0, ev.timestamp_ms),
            ev.timestamp_ms.max(wm),
            wm.saturating_sub(self.cfg.dedupe_horizon.ms()),
        ) {
            self.metrics.events_consumed.with_label_values(&[kind, "duplicate"]).inc();
            return Ok(MsgStatus::Duplicate);
        }
        let mut outcome = "accepted";
        match policy::judge(ev.kind, ev.timestamp_ms, part.clock.watermark, self.cfg.late_policy) {
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
                return Ok(MsgStatus::Rejected(r));
            }
            Lateness::Apply => {
                self.metrics.events_late.with_label_values(&["applied"]).inc();
                outcome = "late_applied";
            }
        }
        if outcome == "accepted" {
            self.hot.accepted(ev.kind).inc();
        } else {
            self.metrics.events_consumed.with_label_values(&[kind, outcome]).inc();
        }
        if ev.kind == EventKind::Conversion {
            part.arrivals.insert(ev.event_id.clone(), m.arrived);
        }
        part.clock.max_ts = part.clock.max_ts.max(ev.timestamp_ms);
        let erase_request = (ev.kind == EventKind::Erase).then(|| (ev.event_id.clone(), ev.timestamp_ms));
        let seq = m.offset.max(0) as u64;
        let wm = part.clock.watermark;
        let mut effects = self.processor.apply(&mut part.store, JourneyEvent::from_event(ev, key, seq), wm)?;
        if let Some((request_id, requested_at)) = erase_request {
            out.erasures.extend(
                effects.iter().filter_map(|e| emit::erasure(id, m.offset, e, &request_id, requested_at, received_at)),
            );
        }
        // Move the watermark: largest event time - allowed lateness (for
        // repartitioned input: of the slowest input partition).
        if payload == Payload::Pseudonymized {
            if let Some(c) = repartition::read_carried(&m.payload) {
                part.sources.update(&c);
            }
        }
        let wm = if payload == Payload::Pseudonymized && !part.sources.0.is_empty() {
            // Until every input partition with a backlog has been read, the
            // watermark waits (low_water is None).
            part.sources
                .low_water()
                .map_or(part.clock.watermark, |low| policy::watermark_after_input(part.clock.watermark, low, lateness))
        } else {
            policy::watermark_after_input(part.clock.watermark, part.clock.max_ts, lateness)
        };
        if wm > part.clock.watermark {
            part.clock.watermark = wm;
            effects.extend(self.processor.advance(&mut part.store, wm)?);
        }
        self.emit(id, &effects, out);
        Ok(MsgStatus::Accepted)
    }

    /// A progress record of the repartition topic: an input partition's
    /// largest event time moved (or it caught up), which may move this
    /// partition's watermark.
    fn take_progress(
        &mut self,
        id: &PartId,
        c: &repartition::Carried,
        lateness: i64,
        out: &mut OutputBatch,
    ) -> Result<()> {
        let part = self.parts.get_mut(id).expect("open partition");
        part.sources.update(c);
        let Some(low) = part.sources.low_water() else { return Ok(()) };
        let wm = policy::watermark_after_input(part.clock.watermark, low, lateness);
        if wm > part.clock.watermark {
            part.clock.watermark = wm;
            let effects = self.processor.advance(&mut part.store, wm)?;
            self.emit(id, &effects, out);
        }
        Ok(())
    }

    /// Tells the pipeline whether a partition has read all of its input
    /// (see [`crate::source::Source::caught_up`]); a partition starts its
    /// idle clock when it becomes caught up.
    pub fn set_caught_up(&mut self, id: &PartId, caught_up: bool, now: Instant) {
        if let Some(p) = self.parts.get_mut(id) {
            match (caught_up, p.idle) {
                (true, None) => p.idle = Some(Idle { since: now, watermark: p.clock.watermark }),
                (false, _) => p.idle = None,
                (true, Some(_)) => {}
            }
        }
    }

    /// A stall (a sink that held a batch, a broker away): every idle clock
    /// starts again, so that time spent stalled never counts as quiet.
    pub fn restart_idle_clocks(&mut self, now: Instant) {
        for p in self.parts.values_mut() {
            if p.idle.is_some() {
                p.idle = Some(Idle { since: now, watermark: p.clock.watermark });
            }
        }
    }

    /// Advances idle partitions by processing time: a partition caught up
    /// for `idle_timeout` moves its watermark on by the time passed since it
    /// caught up, when that makes some journey close. The advance is
    /// recorded with the partition's last offset (durable before the output
    /// is written, see [`Pipeline::persist_decisions`]), so a redelivery
    /// makes it at the same point.
    pub fn tick(&mut self, now: Instant, out: &mut OutputBatch) -> Result<()> {
        let idle = self.cfg.idle_timeout.ms().max(0);
        let ids: Vec<PartId> = self.parts.keys().cloned().collect();
        for id in ids {
            self.replay_advances(&id, None, out)?;
            let part = self.parts.get_mut(&id).expect("listed");
            let Some(state) = part.idle else { continue };
            let quiet = now.saturating_duration_since(state.since).as_millis() as i64;
            let Some(wm) = policy::idle_watermark(part.clock.watermark, state.watermark, quiet, idle) else {
                continue;
            };
            if !part.store.has_due(wm)? {
                continue;
            }
            let Some(after) = part.last_offset() else { continue };
            part.decisions.record(Decision::Advance { after_offset: after, watermark: wm });
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
        let models = part.snapshot.models();
        let stats = part.keep_stats.then_some(&mut part.stats);
        let rows = out.credit.len();
        emit::emit(effects, models, stats, &mut part.arrivals, &self.metrics, &self.hot, out);
        // With a data-driven model, the rows depend on the snapshot.
        part.credited |= part.keep_stats && out.credit.len() > rows;
    }

    /// Writes every decision recorded in this batch to the store (durably,
    /// or, with a changelog, to be published before the output: see
    /// [`partition::Recording`]). Call before the batch's output is written
    /// anywhere.
    pub fn persist_decisions(&mut self) -> Result<()> {
        let flush = self.recording().flush;
        for p in self.parts.values_mut() {
            p.persist_decisions(flush)?;
        }
        Ok(())
    }

    /// How decisions are recorded, by where commits go.
    fn recording(&self) -> partition::Recording {
        match &self.changelog {
            None => partition::Recording::LOCAL,
            // Output a failed commit does not take back (no Kafka transaction).
            Some((log, _)) => partition::Recording { mark_output: !log.transactional(), flush: false },
        }
    }

    /// Refits the data-driven models when `refit_interval` has passed, on
    /// the statistics of every open partition; each partition switches to
    /// the new snapshot at its next commit. Returns true when a model
    /// version changed.
    pub fn maybe_refit(&mut self) -> Result<bool> {
        if self.rounds.is_some() {
            return self.refit_in_round(now_ms(), Instant::now());
        }
        if !self.refit.due() {
            return Ok(false);
        }
        self.refit_now()
    }

    /// With shared statistics: one step of the refit rounds at wall-clock
    /// time `now_ms` ([`shared_stats::Rounds::step`]); refits when the
    /// round's statistics are in. Returns true when a model version changed.
    pub fn refit_in_round(&mut self, now_ms: i64, now: Instant) -> Result<bool> {
        let Some(rounds) = self.rounds.as_mut() else { return Ok(false) };
        let open: Vec<(&PartId, &apportion_engine::datadriven::PathStats)> =
            self.parts.iter().filter(|(_, p)| p.keep_stats).map(|(id, p)| (id, &p.stats)).collect();
        let Some((all, fit)) = rounds.step(now_ms, now, &open, self.cfg.model_plan().empty_stats())? else {
            return Ok(false);
        };
        self.metrics.refit_missing.set(fit.missing as i64);
        if fit.missing > 0 {
            tracing::warn!(round = fit.round, missing = fit.missing, "refit round: some input partitions published no statistics in time; fitted with this instance's or older values (other instances may fit other statistics until the next round)");
        }
        let snapshot = self.refit.refit(&self.store, &all)?;
        self.adopt(snapshot)
    }

    /// Refits now (see [`Pipeline::maybe_refit`]).
    pub fn refit_now(&mut self) -> Result<bool> {
        let mut all = self.cfg.model_plan().empty_stats();
        for p in self.parts.values() {
            all.try_merge(&p.stats).expect("partition statistics share the configured markov_order");
        }
        let snapshot = self.refit.refit(&self.store, &all)?;
        self.adopt(snapshot)
    }

    /// Every partition switches to a new snapshot at its next commit.
    fn adopt(&mut self, snapshot: Option<Arc<crate::refit::Snapshot>>) -> Result<bool> {
        match snapshot {
            Some(s) => {
                for p in self.parts.values_mut() {
                    p.adopt = Some(s.clone());
                }
                Ok(true)
            }
            None => Ok(false),
        }
    }

    /// Commits every partition: state, statistics, clock, offset and model
    /// snapshot, each partition in one atomic batch. Call after the sinks
    /// have the batch's output.
    pub fn commit(&mut self) -> Result<()> {
        let mut prepared = self.prepare_commit()?;
        prepared.write()?;
        self.apply_commit(prepared)
    }

    /// The first half of [`Pipeline::commit`]: every open partition's
    /// commit, collected (journeys encoded, offsets and clocks staged) and
    /// not written. Events processed before [`Pipeline::apply_commit`] go
    /// to the next commit; apply prepared batches in the order prepared.
    pub fn prepare_commit(&mut self) -> Result<PreparedBatch> {
        let horizon = self.cfg.dedupe_horizon.ms();
        let rec = self.recording();
        let mut parts = Vec::with_capacity(self.parts.len());
        for (id, p) in self.parts.iter_mut() {
            parts.push((id.clone(), p.prepare_commit(id, horizon, rec)?));
        }
        self.prepared = true;
        let (changelog, ticket) = match &self.changelog {
            Some((log, gate)) => (Some(log.clone()), Some(gate.enter())),
            None => (None, None),
        };
        Ok(PreparedBatch {
            parts,
            store: self.store.clone(),
            durable: false,
            changelog,
            published: false,
            ticket,
            group: None,
        })
    }

    /// The second half of [`Pipeline::commit`]: writes a prepared batch and
    /// makes it durable, then closes the partitions revoked meanwhile.
    pub fn apply_commit(&mut self, batch: PreparedBatch) -> Result<()> {
        self.prepared = false;
        for (id, prepared) in batch.parts {
            if let Some(p) = self.parts.get_mut(&id) {
                p.apply_commit(prepared)?;
            }
        }
        if !batch.durable {
            // Durable before anything that depends on it (the group commit
            // of the offsets, an HTTP answer): one flush for all partitions.
            self.store.flush()?;
        }
        // Revoked while the batch was written: closed as of that batch.
        // Anything processed for them since is dropped uncommitted (its new
        // owner reads it again from the committed offset).
        for id in std::mem::take(&mut self.closing) {
            self.forget_partition(&id);
        }
        let in_use: Vec<&str> = self.parts.values().filter_map(|p| p.snapshot.version()).collect();
        let in_use: Vec<String> = in_use.into_iter().map(str::to_string).collect();
        let refs: Vec<&str> = in_use.iter().map(String::as_str).collect();
        self.refit.prune(&self.store, &refs)?;
        self.update_gauges();
        Ok(())
    }

    /// Drops uncommitted changes (a prepared commit too) of every partition (a batch whose output
    /// could not be written) by reopening them from the store; the source
    /// must re-deliver from the committed offsets.
    pub fn rollback(&mut self) -> Result<()> {
        self.prepared = false;
        let closing = std::mem::take(&mut self.closing);
        let ids: Vec<(PartId, Payload)> =
            self.parts.iter().filter(|(k, _)| !closing.contains(k)).map(|(k, v)| (k.clone(), v.payload)).collect();
        self.parts.clear();
        for (id, payload) in ids {
            self.open_partition(&id, payload)?;
        }
        Ok(())
    }

    /// The committed source position of a partition (opaque to the
    /// pipeline: e.g. the identity of a followed file).
    pub fn source_position(&self, id: &PartId) -> Result<Option<Vec<u8>>> {
        Ok(self.parts.get(id).context("partition not open")?.store.source_position()?)
    }

    /// A source position to commit with the partition's next offset.
    pub fn set_source_position(&mut self, id: &PartId, bytes: Vec<u8>) {
        if let Some(p) = self.parts.get_mut(id) {
            p.source_position = Some(bytes);
        }
    }

    /// The open partitions.
    pub fn open_partitions(&self) -> Vec<PartId> {
        self.parts.keys().cloned().collect()
    }

    /// Committed offsets per partition.
    pub fn committed_offsets(&self) -> Vec<(PartId, i64)> {
        self.parts.iter().filter_map(|(k, v)| v.committed.map(|o| (k.clone(), o))).collect()
    }

    /// Updates store gauges (and starts or collects the state scan).
    pub fn update_gauges(&mut self) {
        self.state_scan.tick();
        let open: u64 = self.parts.values().map(|p| p.store.open_journeys()).sum();
        self.metrics.journeys_open.set(open as i64);
        let ids: usize = self.parts.values().map(|p| p.store.remembered_ids()).sum();
        self.metrics.dedupe_ids.set(ids as i64);
        let channels = self.parts.values().filter(|p| p.keep_stats).map(|p| p.stats.channel_count()).max();
        self.metrics.stats_channels.set(channels.unwrap_or(0) as i64);
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
