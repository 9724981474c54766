//! The consumer: stage 2 of the repartitioned input, or the only stage.

use std::collections::{BTreeMap, BTreeSet};
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{Context, Result};
use rdkafka::consumer::{BaseConsumer, CommitMode, Consumer, ConsumerContext, Rebalance};
use rdkafka::message::Message;
use rdkafka::{ClientContext, Offset, TopicPartitionList};

use super::changelog::KafkaChangelog;
use super::consumer_config;
use super::repartition::Repartitioner;
use crate::config::{Config, Format};
use crate::metrics::Metrics;
use crate::pipeline::changelog::{Changelog, CommitGate, GroupToken};
use crate::pipeline::{now_ms, Pipeline};
use crate::source::ErrorLog;
use crate::source::{InMsg, MsgStatus, PartId, Payload, Source};

/// How long a revocation waits for the commit being written, and how long
/// a partition's assignment waits for its previous owner's transaction
/// (within the default `max.poll.interval.ms` of 5 minutes, so the
/// instance stays in the group).
const HANDOVER_WAIT: Duration = Duration::from_secs(120);

/// The consumer's rebalance hook. At least once with a changelog: a
/// revocation waits until the commit the sink thread is writing is in the
/// changelog, so the partitions' next owners restore every commit this
/// instance made. Exactly once it does not wait (no gate): the commit in
/// flight carries the input offsets with the generation its batch was read
/// in, so it is either refused (the group moved on) or pending when the
/// next owner asks for the partition's committed offset, and that answer
/// waits for it (KIP-447).
pub struct RevokeGate {
    gate: Option<CommitGate>,
}

impl ClientContext for RevokeGate {}

impl ConsumerContext for RevokeGate {
    fn pre_rebalance(&self, _consumer: &BaseConsumer<Self>, rebalance: &Rebalance<'_>) {
        if let (Rebalance::Revoke(_), Some(gate)) = (rebalance, &self.gate) {
            if !gate.wait_idle(HANDOVER_WAIT) {
                tracing::warn!(
                    waited_s = HANDOVER_WAIT.as_secs(),
                    "partitions revoked while a commit is still being written (a sink or the changelog is stalled); their next owner restores the commit before it"
                );
            }
        }
    }
}

/// The consumer side: stage 2 (or the only stage), plus stage 1 when the
/// input is not keyed by user.
pub struct KafkaSource {
    consumer: BaseConsumer<RevokeGate>,
    /// Asks where partitions end (see [`super::offsets_probe`]).
    probe: BaseConsumer,
    changelog: Option<(Arc<KafkaChangelog>, CommitGate)>,
    payloads: BTreeMap<String, Payload>,
    assigned: BTreeSet<PartId>,
    repartition: Option<Repartitioner>,
    metrics: Metrics,
    lag: Option<u64>,
    errors: ErrorLog,
    /// When each partition's position was last seen at its end.
    caught_up_at: BTreeMap<PartId, Instant>,
    /// When each partition last handed over a message.
    last_message: BTreeMap<PartId, Instant>,
    /// Exactly-once delivery: the batch's input offsets go into its
    /// transaction with the group metadata taken at its poll.
    exactly_once: bool,
    /// The consumer's group metadata right after the last poll.
    group: Option<GroupToken>,
    /// The offset of the last message each partition handed over.
    handed: BTreeMap<PartId, i64>,
}

impl KafkaSource {
    /// Connects and subscribes; `txn`: the instance's transactions
    /// (exactly-once delivery); `instance`: the store's instance name (for
    /// the repartition stage's own `transactional.id`).
    pub fn new(
        cfg: &Config,
        metrics: &Metrics,
        txn: Option<Arc<super::txn::Txn>>,
        instance: &str,
    ) -> Result<KafkaSource> {
        let k = cfg.kafka.as_ref().context("no [kafka] section")?;
        let changelog = match k.changelog {
            true => Some((Arc::new(KafkaChangelog::new(k, metrics, txn)?), CommitGate::default())),
            false => None,
        };
        let exactly_once = k.delivery == crate::config::Delivery::ExactlyOnce;
        let gate = changelog.as_ref().map(|(_, g)| g.clone()).filter(|_| !exactly_once);
        let context = RevokeGate { gate };
        let consumer: BaseConsumer<RevokeGate> =
            consumer_config(k, &k.group_id).create_with_context(context).context("creating the Kafka consumer")?;
        let mut payloads = BTreeMap::new();
        let repartition = if k.input_keyed_by_user {
            for t in &k.input_topics {
                payloads.insert(t.clone(), Payload::Event(k.input_format));
            }
            let topics: Vec<&str> = k.input_topics.iter().map(String::as_str).collect();
            consumer.subscribe(&topics).context("subscribing to the input topics")?;
            None
        } else {
            payloads.insert(k.repartition_topic.clone(), Payload::Pseudonymized);
            consumer.subscribe(&[&k.repartition_topic]).context("subscribing to the repartition topic")?;
            let stage_txn =
                (k.delivery == crate::config::Delivery::ExactlyOnce).then(|| k.repartition_transactional_id(instance));
            Some(Repartitioner::new(cfg, metrics.clone(), stage_txn)?)
        };
        Ok(KafkaSource {
            consumer,
            probe: super::offsets_probe(k, &k.group_id)?,
            changelog,
            payloads,
            assigned: BTreeSet::new(),
            repartition,
            lag: None,
            errors: ErrorLog::default(),
            caught_up_at: BTreeMap::new(),
            last_message: BTreeMap::new(),
            metrics: metrics.clone(),
            exactly_once,
            group: None,
            handed: BTreeMap::new(),
        })
    }

    /// Exactly once: waits until no transaction of a partition's previous
    /// owner still holds input offsets for `new` partitions. Asked with
    /// `isolation.level = read_committed`, the coordinator answers a
    /// partition's committed offset only once no transaction holds a
    /// pending one (librdkafka retries until then; KIP-447), so a commit
    /// the previous owner sent before the group moved on is in the
    /// changelog, or aborted, before the partition is restored.
    fn wait_for_previous_owner(&self, new: &[PartId]) -> Result<()> {
        if !self.exactly_once || new.is_empty() {
            return Ok(());
        }
        let mut tpl = TopicPartitionList::new();
        for id in new {
            tpl.add_partition(&id.source, id.partition);
        }
        self.consumer.committed_offsets(tpl, HANDOVER_WAIT).with_context(|| {
            format!(
                "waiting {}s for the previous owner's transaction on newly assigned partitions {}",
                HANDOVER_WAIT.as_secs(),
                new.iter().map(PartId::store_name).collect::<Vec<_>>().join(", ")
            )
        })?;
        Ok(())
    }

    fn sync_assignment(&mut self, pipeline: &mut Pipeline) -> Result<()> {
        let tpl = self.consumer.assignment().context("reading the partition assignment")?;
        let now: BTreeSet<PartId> = tpl.elements().iter().map(|e| PartId::new(e.topic(), e.partition())).collect();
        for gone in self.assigned.difference(&now).cloned().collect::<Vec<_>>() {
            tracing::info!(topic = %gone.source, partition = gone.partition, "partition revoked");
            pipeline.close_partition(&gone)?;
            self.metrics.consumer_lag.remove_label_values(&[&gone.source, &gone.partition.to_string()]).ok();
        }
        let added: Vec<PartId> = now.difference(&self.assigned).cloned().collect();
        self.wait_for_previous_owner(&added)?;
        for new in added {
            let payload = *self.payloads.get(&new.source).unwrap_or(&Payload::Event(Format::Json));
            if let (Some((log, _)), false) = (&self.changelog, pipeline.is_open(&new)) {
                log.prepare_partition(pipeline.store(), &new)
                    .with_context(|| format!("preparing partition {} from its changelog", new.store_name()))?;
            }
            let committed = pipeline.open_partition(&new, payload)?;
            tracing::info!(topic = %new.source, partition = new.partition, store_offset = ?committed, "partition assigned");
        }
        self.assigned = now;
        Ok(())
    }
}

impl Source for KafkaSource {
    fn poll(&mut self, pipeline: &mut Pipeline, max: usize, wait: Duration) -> Result<Vec<(PartId, Vec<InMsg>)>> {
        if let Some(r) = self.repartition.as_mut() {
            r.pump(max, Duration::from_millis(0))?;
        }
        let deadline = Instant::now() + wait;
        let mut got: BTreeMap<PartId, Vec<InMsg>> = BTreeMap::new();
        let mut n = 0;
        while n < max {
            let left = deadline.saturating_duration_since(Instant::now());
            match self.consumer.poll(if n == 0 { left } else { Duration::ZERO }) {
                Some(Ok(m)) => {
                    let id = PartId::new(m.topic(), m.partition());
                    // Processing time of the message: its record timestamp
                    // (in the log, so a redelivery sees the same one).
                    let timestamp_ms = m.timestamp().to_millis().unwrap_or_else(now_ms);
                    self.last_message.insert(id.clone(), Instant::now());
                    got.entry(id).or_default().push(InMsg {
                        offset: m.offset(),
                        payload: m.payload().unwrap_or_default().to_vec(),
                        arrived: Instant::now(),
                        timestamp_ms,
                    });
                    n += 1;
                }
                Some(Err(e)) => {
                    self.errors.report("Kafka consumer error", &e);
                    // The broker may be away: no partition counts as caught
                    // up until a new lag reading says so.
                    self.caught_up_at.clear();
                    break;
                }
                None => {
                    if Instant::now() >= deadline || n > 0 {
                        break;
                    }
                }
            }
        }
        self.sync_assignment(pipeline)?;
        // Messages of partitions no longer assigned belong to their new owner.
        got.retain(|id, _| self.assigned.contains(id));
        self.handed.retain(|id, _| self.assigned.contains(id));
        for (id, msgs) in &got {
            if let Some(m) = msgs.last() {
                self.handed.insert(id.clone(), m.offset);
            }
        }
        // After the assignment is read: the batch holds only partitions
        // assigned in this generation (or an older one, then refused).
        if self.exactly_once {
            self.group = self.consumer.group_metadata().map(|g| Arc::new(g) as GroupToken);
        }
        Ok(got.into_iter().collect())
    }

    fn committed(&mut self, pipeline: &Pipeline, _statuses: Vec<(PartId, Vec<MsgStatus>)>) -> Result<()> {
        if self.exactly_once {
            // Committed in the batch's transaction.
            return Ok(());
        }
        let mut tpl = TopicPartitionList::new();
        for (id, off) in pipeline.committed_offsets() {
            if self.assigned.contains(&id) {
                tpl.add_partition_offset(&id.source, id.partition, Offset::Offset(off + 1))?;
            }
        }
        if tpl.count() > 0 {
            if let Err(e) = self.consumer.commit(&tpl, CommitMode::Async) {
                // The store holds the offsets; the group's copy is a fallback.
                tracing::warn!(error = %e, "committing offsets to the consumer group failed");
            }
        }
        Ok(())
    }

    fn update_lag(&mut self, metrics: &Metrics) {
        let Ok(positions) = self.consumer.position() else {
            self.caught_up_at.clear();
            return;
        };
        let mut total = 0u64;
        let now = Instant::now();
        // Before a partition's first message the position is unknown: the
        // group's committed offset is where reading starts. Asked only then:
        // read_committed, the answer waits while a batch transaction of this
        // instance holds pending offsets (KIP-447).
        let unknown = positions.elements().iter().any(|e| !matches!(e.offset(), Offset::Offset(_)));
        let committed = if unknown { self.consumer.committed(Duration::from_secs(2)).ok() } else { None };
        for e in positions.elements() {
            let id = PartId::new(e.topic(), e.partition());
            let Ok((low, high)) = self.probe.fetch_watermarks(e.topic(), e.partition(), Duration::from_secs(1)) else {
                self.caught_up_at.remove(&id);
                continue;
            };
            let pos = match e.offset() {
                Offset::Offset(o) => o,
                _ => match committed
                    .as_ref()
                    .and_then(|c| c.find_partition(e.topic(), e.partition()))
                    .map(|c| c.offset())
                {
                    Some(Offset::Offset(o)) => o,
                    // Nothing committed: reading starts at the beginning.
                    _ => low,
                },
            };
            let lag = (high - pos).max(0) as u64;
            total += lag;
            if lag == 0 {
                self.caught_up_at.insert(id, now);
            } else {
                self.caught_up_at.remove(&id);
            }
            metrics.consumer_lag.with_label_values(&[e.topic(), &e.partition().to_string()]).set(lag as i64);
        }
        self.lag = Some(total);
    }

    fn lag(&self) -> Option<u64> {
        self.lag
    }

    fn group(&self) -> Option<GroupToken> {
        self.group.clone()
    }

    /// Points the consumer back at the committed offset (the store's; else
    /// the group's, else the beginning, where a new reader starts) of each
    /// assigned partition that handed over messages past it. librdkafka
    /// drops the messages it fetched before. A partition that handed over
    /// nothing since is left alone (one just assigned may not take a seek
    /// yet).
    fn rewind(&mut self, pipeline: &Pipeline) -> Result<()> {
        let committed: BTreeMap<PartId, i64> = pipeline.committed_offsets().into_iter().collect();
        let behind: Vec<PartId> = self
            .assigned
            .iter()
            .filter(|id| self.handed.get(*id).is_some_and(|h| committed.get(*id).is_none_or(|c| h > c)))
            .cloned()
            .collect();
        let mut group_tpl = TopicPartitionList::new();
        for id in behind.iter().filter(|id| !committed.contains_key(id)) {
            group_tpl.add_partition(&id.source, id.partition);
        }
        let group: BTreeMap<PartId, Offset> = match group_tpl.count() {
            0 => BTreeMap::new(),
            _ => super::group_starts(&self.consumer, group_tpl, HANDOVER_WAIT)
                .context("reading the group's committed offsets")?
                .into_iter()
                .map(|(topic, partition, to)| (PartId::new(&topic, partition), to))
                .collect(),
        };
        for id in &behind {
            let to = match committed.get(id) {
                Some(o) => Offset::Offset(o + 1),
                None => group.get(id).copied().unwrap_or(Offset::Beginning),
            };
            self.consumer.seek(&id.source, id.partition, to, Duration::from_secs(10)).with_context(|| {
                format!("reading partition {} again from {to:?} after a refused transaction", id.store_name())
            })?;
            self.caught_up_at.remove(id);
            self.handed.remove(id);
        }
        tracing::info!(
            partitions = behind.len(),
            "the partitions still assigned are read again from their committed offsets"
        );
        Ok(())
    }

    fn changelog(&self) -> Option<(Arc<dyn Changelog>, CommitGate)> {
        self.changelog.as_ref().map(|(log, gate)| (log.clone() as Arc<dyn Changelog>, gate.clone()))
    }

    fn ready(&self) -> bool {
        !self.assigned.is_empty()
    }

    /// Caught up: the last lag reading found the partition's position at
    /// its end, and no message came since.
    fn caught_up(&self, part: &PartId) -> bool {
        match (self.caught_up_at.get(part), self.last_message.get(part)) {
            (Some(at), Some(msg)) => at > msg,
            (Some(_), None) => true,
            (None, _) => false,
        }
    }

    fn close(&mut self, _pipeline: &mut Pipeline) -> Result<()> {
        self.consumer.unsubscribe();
        Ok(())
    }
}
