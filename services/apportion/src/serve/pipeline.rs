//! The synchronous heart of `serve`: per-partition journey state, watermarks,
//! duplicate and late handling, credit, and the data-driven refit schedule.
//!
//! Sources hand it batches of raw messages per partition; it returns what to
//! write (an [`OutputBatch`]) and a status per message. Nothing here talks to
//! Kafka or HTTP, so the same pipeline runs behind the Kafka source, the
//! embedded HTTP/file sources and the tests. Durability order (at least
//! once): sinks first, then [`Pipeline::commit`] writes state, statistics,
//! watermark and input offsets of each partition in one sled batch.

use std::collections::{BTreeMap, HashMap};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use anyhow::{Context, Result};
use apportion_engine::datadriven::PathStats;
use apportion_engine::event::parse_event_limited;
use apportion_engine::replay::{effect_rows, event_id_digest};
use apportion_engine::time_fmt::format_ms;
use apportion_engine::{
    Effect, Event, EventKind, KeyedEvent, Model, Outcome, Processor, Pseudonymizer, RejectReason,
    Rejection, UserKey,
};
use apportion_sinks::{DeadLetter, OutputBatch};
use apportion_store::{PartitionStore, Store};

use crate::config::{Config, Format, LatePolicy};
use crate::metrics::Metrics;
use crate::models::build_models;

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
    fn store_name(&self) -> String {
        format!("{}/{}", self.source, self.partition)
    }
}

/// How a partition's payloads are encoded.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Payload {
    /// A contract event (JSON or protobuf) with a raw `user_id`.
    Event(Format),
    /// An internal repartitioned event: JSON whose `user_id` is already the user key (hex).
    Keyed,
}

/// One raw input message.
#[derive(Debug, Clone)]
pub struct InMsg {
    /// Offset in its partition (or sequence number).
    pub offset: i64,
    /// The bytes.
    pub payload: Vec<u8>,
    /// When the service received it.
    pub arrived: Instant,
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
}

struct PartState {
    store: PartitionStore,
    payload: Payload,
    watermark: i64,
    max_ts: i64,
    stats: PathStats,
    stats_dirty: bool,
    last_input: Instant,
    wm_at_input: i64,
    committed: Option<i64>,
    pending_offset: Option<i64>,
    batches: u64,
}

/// The pipeline.
pub struct Pipeline {
    cfg: Config,
    pseudo: Pseudonymizer,
    processor: Processor,
    store: Store,
    parts: BTreeMap<PartId, PartState>,
    models: Vec<Box<dyn Model>>,
    data_driven: bool,
    last_fit: Instant,
    arrivals: HashMap<String, Instant>,
    metrics: Metrics,
    models_json: serde_json::Value,
}

const META_CLOCK: &str = "clock";
const META_STATS: &str = "stats";

fn now_ms() -> i64 {
    SystemTime::now().duration_since(UNIX_EPOCH).map(|d| d.as_millis() as i64).unwrap_or(0)
}

impl Pipeline {
    /// Opens the pipeline over `store`.
    pub fn new(cfg: Config, pseudo: Pseudonymizer, store: Store, metrics: Metrics) -> Result<Self> {
        let data_driven = cfg.models.iter().any(|m| m == "shapley" || m == "markov");
        let models = build_models(&cfg, None)?;
        let mut p = Pipeline {
            processor: Processor::new(cfg.rules()),
            cfg,
            pseudo,
            store,
            parts: BTreeMap::new(),
            models,
            data_driven,
            last_fit: Instant::now(),
            arrivals: HashMap::new(),
            metrics,
            models_json: serde_json::Value::Null,
        };
        p.refit()?;
        Ok(p)
    }

    /// The configuration.
    pub fn config(&self) -> &Config {
        &self.cfg
    }

    /// Current models.
    pub fn models(&self) -> &[Box<dyn Model>] {
        &self.models
    }

    /// The current snapshot as JSON for the read-only model endpoint: every
    /// model's name and version, and for the data-driven ones the fitted
    /// weights (Shapley value per channel in the game over all channels,
    /// Markov conversion probability and removal effect per channel).
    pub fn models_json(&self) -> serde_json::Value {
        self.models_json.clone()
    }

    /// Opens a partition's state (on assignment); returns its committed offset.
    pub fn open_partition(&mut self, id: &PartId, payload: Payload) -> Result<Option<i64>> {
        if let Some(p) = self.parts.get(id) {
            return Ok(p.committed);
        }
        let name = id.store_name();
        let store = self.store.partition(&name, self.cfg.cache_bytes)?;
        let committed = store.offset(&name)?;
        let (mut watermark, mut max_ts) = (i64::MIN, i64::MIN);
        if let Some(b) = store.meta(META_CLOCK)? {
            if b.len() == 17 && b[0] == 1 {
                max_ts = i64::from_be_bytes(b[1..9].try_into().expect("8 bytes"));
                watermark = i64::from_be_bytes(b[9..17].try_into().expect("8 bytes"));
            }
        }
        let stats = match store.meta(META_STATS)? {
            Some(b) if b.first() == Some(&1) => serde_json::from_slice(&b[1..])
                .with_context(|| format!("path statistics of partition {name} are corrupt"))?,
            Some(b) => anyhow::bail!("path statistics of partition {name} have unknown format version {:?}", b.first()),
            None => PathStats::new(self.cfg.markov_order),
        };
        self.parts.insert(
            id.clone(),
            PartState {
                store,
                payload,
                watermark,
                max_ts,
                stats,
                stats_dirty: false,
                last_input: Instant::now(),
                wm_at_input: watermark,
                committed,
                pending_offset: None,
                batches: 0,
            },
        );
        Ok(committed)
    }

    /// Commits and closes a partition's state (on revocation).
    pub fn close_partition(&mut self, id: &PartId) -> Result<()> {
        self.commit_part(id)?;
        self.parts.remove(id);
        self.metrics.watermark_lag.remove_label_values(&[&id.partition.to_string()]).ok();
        Ok(())
    }

    fn decode(&self, payload: Payload, bytes: &[u8]) -> Result<(Event, Option<UserKey>), Rejection> {
        match payload {
            Payload::Event(Format::Json) => parse_event_limited(bytes, self.cfg.max_event_bytes).map(|e| (e, None)),
            Payload::Event(Format::Protobuf) => {
                crate::wire::decode_event(bytes, self.cfg.max_event_bytes).map(|e| (e, None))
            }
            Payload::Keyed => {
                let ev = parse_event_limited(bytes, self.cfg.max_event_bytes)?;
                let key = UserKey::from_hex(&ev.user_id)
                    .ok_or_else(|| Rejection::new(RejectReason::InvalidUserId, "repartitioned event without a user key"))?;
                Ok((ev, Some(key)))
            }
        }
    }

    /// Applies one batch of a partition's messages; appends output to `out`.
    pub fn process(&mut self, id: &PartId, msgs: &[InMsg], out: &mut OutputBatch) -> Result<Vec<MsgStatus>> {
        let payload = self.parts.get(id).context("partition not open")?.payload;
        let mut statuses = Vec::with_capacity(msgs.len());
        let mut effects: Vec<Effect> = Vec::new();
        let received_at = format_ms(now_ms());
        for m in msgs {
            let decoded = self.decode(payload, &m.payload);
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
                    let kind = sniff_type(&m.payload);
                    self.metrics.events_consumed.with_label_values(&[kind, "rejected"]).inc();
                    self.metrics.events_rejected.with_label_values(&[r.reason.code()]).inc();
                    out.dead_letters.push(dead_letter(id, m.offset, &r, sniff_event_id(&m.payload), &received_at));
                    statuses.push(MsgStatus::Rejected(r));
                    continue;
                }
            };
            let kind = ev.kind.as_str();
            let key = key.unwrap_or_else(|| self.pseudo.key_for(&ev.user_id));
            ev.user_id.clear();
            if ev.kind != EventKind::Erase
                && !part.store.mark_seen(event_id_digest(&ev.event_id), ev.timestamp_ms)?
            {
                self.metrics.events_consumed.with_label_values(&[kind, "duplicate"]).inc();
                statuses.push(MsgStatus::Duplicate);
                continue;
            }
            let mut outcome = "accepted";
            if part.watermark != i64::MIN && ev.timestamp_ms < part.watermark {
                match self.cfg.late_policy {
                    LatePolicy::DeadLetter => {
                        let r = Rejection::new(
                            RejectReason::Late,
                            format!(
                                "event time {} is before the partition watermark {}",
                                format_ms(ev.timestamp_ms),
                                format_ms(part.watermark)
                            ),
                        );
                        self.metrics.events_consumed.with_label_values(&[kind, "late_dropped"]).inc();
                        self.metrics.events_late.with_label_values(&["dropped"]).inc();
                        self.metrics.events_rejected.with_label_values(&["late"]).inc();
                        out.dead_letters.push(dead_letter(id, m.offset, &r, Some(ev.event_id.clone()), &received_at));
                        statuses.push(MsgStatus::Rejected(r));
                        continue;
                    }
                    LatePolicy::Apply => {
                        self.metrics.events_late.with_label_values(&["applied"]).inc();
                        outcome = "late_applied";
                    }
                }
            }
            self.metrics.events_consumed.with_label_values(&[kind, outcome]).inc();
            if ev.kind == EventKind::Conversion {
                self.arrivals.insert(ev.event_id.clone(), m.arrived);
            }
            part.max_ts = part.max_ts.max(ev.timestamp_ms);
            let seq = m.offset.max(0) as u64;
            let wm = part.watermark;
            effects.extend(self.processor.apply(&mut part.store, KeyedEvent::from_event(ev, key, seq), wm)?);
            statuses.push(MsgStatus::Accepted);
        }
        // Move the watermark: max event time - allowed lateness.
        let part = self.parts.get_mut(id).expect("checked above");
        if part.max_ts != i64::MIN {
            let wm = part.max_ts.saturating_sub(self.cfg.allowed_lateness.ms());
            if wm > part.watermark {
                part.watermark = wm;
                effects.extend(self.processor.advance(&mut part.store, wm)?);
            }
        }
        part.wm_at_input = part.watermark;
        self.emit(id, effects, out);
        Ok(statuses)
    }

    /// Advances idle partitions by processing time (after `idle_timeout`
    /// without input, event time is assumed to move with the clock).
    pub fn tick(&mut self, now: Instant, out: &mut OutputBatch) -> Result<()> {
        let idle = Duration::from_millis(self.cfg.idle_timeout.ms().max(0) as u64);
        let ids: Vec<PartId> = self.parts.keys().cloned().collect();
        for id in ids {
            let part = self.parts.get_mut(&id).expect("listed");
            if part.watermark == i64::MIN {
                continue;
            }
            let quiet = now.saturating_duration_since(part.last_input);
            if quiet < idle {
                continue;
            }
            let wm = part.wm_at_input.saturating_add(quiet.as_millis() as i64);
            if wm > part.watermark {
                part.watermark = wm;
                let effects = self.processor.advance(&mut part.store, wm)?;
                if part.pending_offset.is_none() {
                    part.pending_offset = part.committed;
                }
                self.emit(&id, effects, out);
            }
        }
        Ok(())
    }

    fn emit(&mut self, id: &PartId, effects: Vec<Effect>, out: &mut OutputBatch) {
        let part = self.parts.get_mut(id).expect("open partition");
        for e in &effects {
            match e {
                Effect::Journey { outcome, .. } => {
                    if let Some((converted, path)) = outcome.closed_path() {
                        let chans: Vec<&str> = path.iter().map(|t| t.channel.as_str()).collect();
                        part.stats.add_path(&chans, converted);
                        part.stats_dirty = true;
                        self.metrics.paths_closed.with_label_values(&[if converted { "true" } else { "false" }]).inc();
                    }
                    match outcome {
                        Outcome::Converted { conversion, path } => {
                            self.metrics.journeys_closed.with_label_values(&["converted"]).inc();
                            self.metrics
                                .conversions
                                .with_label_values(&[if path.is_empty() { "false" } else { "true" }])
                                .inc();
                            if let Some(t) = self.arrivals.remove(&conversion.event_id) {
                                self.metrics.latency.observe(t.elapsed().as_secs_f64());
                            }
                        }
                        Outcome::Expired { .. } => self.metrics.journeys_closed.with_label_values(&["expired"]).inc(),
                    }
                }
                Effect::Erased { .. } => self.metrics.journeys_closed.with_label_values(&["erased"]).inc(),
            }
            let (rows, path) = effect_rows(e, &self.models);
            for r in &rows {
                self.metrics.credit_rows.with_label_values(&[&r.model]).inc();
            }
            out.credit.extend(rows);
            out.paths.extend(path);
        }
    }

    fn commit_part(&mut self, id: &PartId) -> Result<()> {
        let name = id.store_name();
        let horizon = self.cfg.dedupe_horizon.ms();
        let Some(part) = self.parts.get_mut(id) else { return Ok(()) };
        if let Some(o) = part.pending_offset.take() {
            part.store.stage_offset(&name, o);
            part.committed = Some(o);
        }
        let mut clock = vec![1u8];
        clock.extend_from_slice(&part.max_ts.to_be_bytes());
        clock.extend_from_slice(&part.watermark.to_be_bytes());
        part.store.stage_meta(META_CLOCK, clock);
        if part.stats_dirty {
            let mut b = vec![1u8];
            b.extend(serde_json::to_vec(&part.stats)?);
            part.store.stage_meta(META_STATS, b);
            part.stats_dirty = false;
        }
        part.store.commit(true)?;
        part.batches += 1;
        if part.batches % 100 == 0 && part.watermark != i64::MIN {
            part.store.prune_seen(part.watermark.saturating_sub(horizon))?;
        }
        Ok(())
    }

    /// Commits every partition: state, statistics, watermark and offsets,
    /// each partition in one atomic batch. Call after the sinks have the
    /// batch's output.
    pub fn commit(&mut self) -> Result<()> {
        let ids: Vec<PartId> = self.parts.keys().cloned().collect();
        for id in ids {
            self.commit_part(&id)?;
        }
        self.update_gauges();
        Ok(())
    }

    /// Drops uncommitted changes of every partition (a batch whose output
    /// could not be written); the source must re-deliver from the committed offsets.
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
    pub fn maybe_refit(&mut self) -> Result<()> {
        if self.data_driven && self.last_fit.elapsed().as_millis() as i64 >= self.cfg.refit_interval.ms() {
            self.refit()?;
        }
        Ok(())
    }

    /// Refits now from the statistics of every open partition.
    pub fn refit(&mut self) -> Result<()> {
        self.last_fit = Instant::now();
        if !self.data_driven {
            self.models_json = self.weights_json(&PathStats::new(self.cfg.markov_order));
            return Ok(());
        }
        let started = Instant::now();
        let mut all = PathStats::new(self.cfg.markov_order);
        for p in self.parts.values() {
            all.merge(&p.stats);
        }
        match build_models(&self.cfg, Some(&all)) {
            Ok(m) => {
                self.models = m;
                self.models_json = self.weights_json(&all);
                let secs = started.elapsed().as_secs_f64();
                let now = now_ms() as f64 / 1000.0;
                for name in ["shapley", "markov"] {
                    if self.cfg.models.iter().any(|m| m == name) {
                        self.metrics.refit_time.with_label_values(&[name]).set(now);
                        self.metrics.refit_duration.with_label_values(&[name]).set(secs);
                    }
                }
                tracing::info!(paths = all.paths(), conversions = all.conversions(), seconds = secs, "refitted data-driven models");
            }
            Err(e) => {
                for name in ["shapley", "markov"] {
                    if self.cfg.models.iter().any(|m| m == name) {
                        self.metrics.refit_failures.with_label_values(&[name]).inc();
                    }
                }
                tracing::error!(error = %e, "refit failed; keeping the previous snapshot");
            }
        }
        Ok(())
    }

    fn weights_json(&self, stats: &PathStats) -> serde_json::Value {
        use apportion_engine::datadriven::{MarkovModel, ShapleyModel};
        let models: Vec<serde_json::Value> = self
            .models
            .iter()
            .map(|m| {
                let mut v = serde_json::json!({ "model": m.name(), "model_version": m.version() });
                match m.name() {
                    "shapley" => {
                        let g = ShapleyModel::fit(stats).global_values(crate::explain::GLOBAL_SEED);
                        v["channels"] = serde_json::to_value(&g.channels).unwrap_or_default();
                        v["method"] = serde_json::to_value(g.method).unwrap_or_default();
                    }
                    "markov" => {
                        let mk = MarkovModel::fit(stats);
                        v["conversion_probability"] = serde_json::json!(mk.conversion_probability());
                        v["removal_effects"] = mk
                            .removal_effects()
                            .into_iter()
                            .map(|(c, r)| serde_json::json!({ "channel": c, "removal_effect": r }))
                            .collect();
                    }
                    _ => {}
                }
                v
            })
            .collect();
        serde_json::json!({ "paths": stats.paths(), "conversions": stats.conversions(), "models": models })
    }

    /// Updates store gauges.
    pub fn update_gauges(&self) {
        let open: u64 = self.parts.values().map(|p| p.store.open_journeys()).sum();
        self.metrics.journeys_open.set(open as i64);
        self.metrics.store_size.set(self.store.size_on_disk() as i64);
        let now = now_ms();
        for (id, p) in &self.parts {
            if p.watermark != i64::MIN {
                self.metrics
                    .watermark_lag
                    .with_label_values(&[&id.partition.to_string()])
                    .set((now - p.watermark) as f64 / 1000.0);
            }
        }
    }

    /// Makes the store durable (shutdown).
    pub fn flush(&mut self) -> Result<()> {
        self.commit()?;
        self.store.flush()?;
        Ok(())
    }

    /// End of a finite input (the demo): moves every partition's watermark
    /// to the end of time, which credits every pending conversion and closes
    /// every open journey, as replay does at the end of its input.
    pub fn drain(&mut self, out: &mut OutputBatch) -> Result<()> {
        let ids: Vec<PartId> = self.parts.keys().cloned().collect();
        for id in ids {
            let part = self.parts.get_mut(&id).expect("listed");
            part.watermark = i64::MAX;
            let effects = self.processor.advance(&mut part.store, i64::MAX)?;
            self.emit(&id, effects, out);
        }
        Ok(())
    }
}

fn dead_letter(id: &PartId, offset: i64, r: &Rejection, event_id: Option<String>, received_at: &str) -> DeadLetter {
    DeadLetter {
        reason: r.reason.code().to_string(),
        detail: r.detail.clone(),
        source: id.source.clone(),
        partition: Some(id.partition),
        offset: Some(offset),
        event_id,
        received_at: received_at.to_string(),
    }
}

/// Best-effort event type of a rejected payload, for the metric label.
fn sniff_type(payload: &[u8]) -> &'static str {
    let Ok(v) = serde_json::from_slice::<serde_json::Value>(payload) else { return "unknown" };
    match v.get("type").and_then(|t| t.as_str()) {
        Some("touch") => "touch",
        Some("conversion") => "conversion",
        Some("erase") => "erase",
        _ => "unknown",
    }
}

/// Best-effort `event_id` of a rejected payload (never the user id).
fn sniff_event_id(payload: &[u8]) -> Option<String> {
    let v = serde_json::from_slice::<serde_json::Value>(payload).ok()?;
    let id = v.get("event_id")?.as_str()?;
    (id.len() <= apportion_engine::event::MAX_EVENT_ID_BYTES).then(|| id.to_string())
}
