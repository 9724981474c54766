//! Kafka source and sink (rdkafka over librdkafka built from its vendored
//! source). The consumer never auto-commits: offsets are committed to the
//! group only after the batch's output is delivered and the state is
//! committed to sled; on assignment, offsets already applied according to the
//! store are skipped, so the store is the authority and the group's offsets a
//! fallback.

use std::collections::{BTreeMap, BTreeSet};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{Context, Result};
use apportion_engine::event::parse_event_limited;
use apportion_sinks::{OutputBatch, Sink, SinkError};
use rdkafka::config::ClientConfig;
use rdkafka::consumer::{BaseConsumer, CommitMode, Consumer};
use rdkafka::error::KafkaError;
use rdkafka::message::Message;
use rdkafka::producer::{BaseProducer, BaseRecord, DeliveryResult, Producer, ProducerContext};
use rdkafka::types::RDKafkaErrorCode;
use rdkafka::{ClientContext, Offset, TopicPartitionList};

use super::pipeline::{InMsg, MsgStatus, PartId, Payload, Pipeline};
use super::Source;
use crate::config::{Config, Format, KafkaConfig};
use crate::metrics::Metrics;

/// librdkafka properties apportion sets itself.
fn base_config(k: &KafkaConfig) -> ClientConfig {
    let mut c = ClientConfig::new();
    c.set("bootstrap.servers", &k.brokers);
    for (key, v) in &k.properties {
        c.set(key, v);
    }
    c
}

/// Consumer configuration: manual offsets, start from the earliest offset
/// for a new group.
pub fn consumer_config(k: &KafkaConfig, group: &str) -> ClientConfig {
    let mut c = base_config(k);
    c.set("group.id", group)
        .set("enable.auto.commit", "false")
        .set("enable.auto.offset.store", "false")
        .set("auto.offset.reset", "earliest")
        .set("enable.partition.eof", "false");
    for (key, v) in &k.properties {
        c.set(key, v);
    }
    c
}

/// The consumer side: stage 2 (or the only stage), plus stage 1 when the
/// input is not keyed by user.
pub struct KafkaSource {
    consumer: BaseConsumer,
    payloads: BTreeMap<String, Payload>,
    assigned: BTreeSet<PartId>,
    repartition: Option<Repartitioner>,
    lag: Option<u64>,
    last_error: Option<Instant>,
}

impl KafkaSource {
    /// Connects and subscribes.
    pub fn new(cfg: &Config, metrics: &Metrics) -> Result<KafkaSource> {
        let k = cfg.kafka.as_ref().context("no [kafka] section")?;
        let consumer: BaseConsumer = consumer_config(k, &k.group_id).create().context("creating the Kafka consumer")?;
        let mut payloads = BTreeMap::new();
        let repartition = if k.input_keyed_by_user {
            for t in &k.input_topics {
                payloads.insert(t.clone(), Payload::Event(k.input_format));
            }
            let topics: Vec<&str> = k.input_topics.iter().map(String::as_str).collect();
            consumer.subscribe(&topics).context("subscribing to the input topics")?;
            None
        } else {
            payloads.insert(k.repartition_topic.clone(), Payload::Keyed);
            consumer.subscribe(&[&k.repartition_topic]).context("subscribing to the repartition topic")?;
            Some(Repartitioner::new(cfg, metrics.clone())?)
        };
        Ok(KafkaSource { consumer, payloads, assigned: BTreeSet::new(), repartition, lag: None, last_error: None })
    }

    fn sync_assignment(&mut self, pipeline: &mut Pipeline) -> Result<()> {
        let tpl = self.consumer.assignment().context("reading the partition assignment")?;
        let now: BTreeSet<PartId> =
            tpl.elements().iter().map(|e| PartId::new(e.topic(), e.partition())).collect();
        for gone in self.assigned.difference(&now).cloned().collect::<Vec<_>>() {
            tracing::info!(topic = %gone.source, partition = gone.partition, "partition revoked");
            pipeline.close_partition(&gone)?;
        }
        for new in now.difference(&self.assigned).cloned().collect::<Vec<_>>() {
            let payload = *self.payloads.get(&new.source).unwrap_or(&Payload::Event(Format::Json));
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
                    got.entry(id).or_default().push(InMsg {
                        offset: m.offset(),
                        payload: m.payload().unwrap_or_default().to_vec(),
                        arrived: Instant::now(),
                    });
                    n += 1;
                }
                Some(Err(e)) => {
                    if self.last_error.map_or(true, |t| t.elapsed() > Duration::from_secs(10)) {
                        tracing::warn!(error = %e, "Kafka consumer error");
                        self.last_error = Some(Instant::now());
                    }
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
        Ok(got.into_iter().collect())
    }

    fn committed(&mut self, pipeline: &Pipeline, _statuses: Vec<(PartId, Vec<MsgStatus>)>) -> Result<()> {
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
        let Ok(positions) = self.consumer.position() else { return };
        let mut total = 0u64;
        for e in positions.elements() {
            let Ok((_, high)) = self.consumer.fetch_watermarks(e.topic(), e.partition(), Duration::from_secs(1)) else {
                continue;
            };
            let pos = match e.offset() {
                Offset::Offset(o) => o,
                _ => continue,
            };
            let lag = (high - pos).max(0) as u64;
            total += lag;
            metrics.consumer_lag.with_label_values(&[&e.partition().to_string()]).set(lag as i64);
        }
        self.lag = Some(total);
    }

    fn lag(&self) -> Option<u64> {
        self.lag
    }

    fn ready(&self) -> bool {
        !self.assigned.is_empty()
    }

    fn close(&mut self, _pipeline: &mut Pipeline) -> Result<()> {
        self.consumer.unsubscribe();
        Ok(())
    }
}

/// Counts delivery failures of the producer.
#[derive(Default, Clone)]
pub struct DeliveryCounter {
    failed: Arc<AtomicU64>,
    last: Arc<Mutex<Option<String>>>,
}

impl ClientContext for DeliveryCounter {}

impl ProducerContext for DeliveryCounter {
    type DeliveryOpaque = ();
    fn delivery(&self, result: &DeliveryResult<'_>, _: ()) {
        if let Err((e, _)) = result {
            self.failed.fetch_add(1, Ordering::SeqCst);
            *self.last.lock().expect("delivery error slot") = Some(e.to_string());
        }
    }
}

/// An idempotent producer.
pub fn producer(k: &KafkaConfig) -> Result<BaseProducer<DeliveryCounter>> {
    let mut c = base_config(k);
    c.set("enable.idempotence", "true").set("acks", "all").set("linger.ms", "5");
    for (key, v) in &k.properties {
        c.set(key, v);
    }
    c.create_with_context(DeliveryCounter::default()).context("creating the Kafka producer")
}

fn send(p: &BaseProducer<DeliveryCounter>, topic: &str, key: Option<&str>, payload: &[u8]) -> Result<(), KafkaError> {
    let mut rec = BaseRecord::to(topic).payload(payload);
    if let Some(k) = key {
        rec = rec.key(k);
    }
    let mut rec = rec;
    loop {
        match p.send(rec) {
            Ok(()) => return Ok(()),
            Err((KafkaError::MessageProduction(RDKafkaErrorCode::QueueFull), r)) => {
                p.poll(Duration::from_millis(50));
                rec = r;
            }
            Err((e, _)) => return Err(e),
        }
    }
}

fn flush_checked(p: &BaseProducer<DeliveryCounter>, before: u64, sink: &'static str) -> Result<(), SinkError> {
    p.flush(Duration::from_secs(60)).map_err(|e| SinkError::retry(sink, format!("flush: {e}")))?;
    let after = p.context().failed.load(Ordering::SeqCst);
    if after > before {
        let last = p.context().last.lock().expect("slot").clone().unwrap_or_default();
        return Err(SinkError::retry(sink, format!("{} messages not delivered: {last}", after - before)));
    }
    Ok(())
}

/// Credit rows, paths and dead letters to their topics, keyed by user key.
pub struct KafkaSink {
    producer: BaseProducer<DeliveryCounter>,
    credit_topic: String,
    paths_topic: String,
    dead_topic: String,
    format: Format,
}

impl KafkaSink {
    /// Builds the sink.
    pub fn new(cfg: &Config) -> Result<KafkaSink> {
        let k = cfg.kafka.as_ref().context("no [kafka] section")?;
        Ok(KafkaSink {
            producer: producer(k)?,
            credit_topic: k.credit_topic.clone(),
            paths_topic: k.paths_topic.clone(),
            dead_topic: k.dead_letter_topic.clone(),
            format: k.output_format,
        })
    }
}

impl Sink for KafkaSink {
    fn name(&self) -> &'static str {
        "kafka"
    }

    fn write(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        let before = self.producer.context().failed.load(Ordering::SeqCst);
        let err = |e: KafkaError| SinkError::retry("kafka", e.to_string());
        for r in &batch.credit {
            let bytes = crate::wire::encode_credit(self.format, r);
            send(&self.producer, &self.credit_topic, Some(&r.user_key), &bytes).map_err(err)?;
        }
        for p in &batch.paths {
            let bytes = crate::wire::encode_path(self.format, p);
            send(&self.producer, &self.paths_topic, Some(&p.user_key), &bytes).map_err(err)?;
        }
        for d in &batch.dead_letters {
            let bytes = crate::wire::encode_dead_letter(self.format, d);
            send(&self.producer, &self.dead_topic, None, &bytes).map_err(err)?;
        }
        flush_checked(&self.producer, before, "kafka")
    }

    fn close(&mut self) -> Result<(), SinkError> {
        self.producer.flush(Duration::from_secs(30)).map_err(|e| SinkError::fatal("kafka", e.to_string()))
    }
}

/// Stage 1 for input not keyed by user: validates each event, replaces the
/// raw user id with its pseudonymous key (so no raw id reaches the internal
/// topic) and re-produces it keyed by that key.
pub struct Repartitioner {
    consumer: BaseConsumer,
    producer: BaseProducer<DeliveryCounter>,
    topic: String,
    dead_topic: String,
    format: Format,
    max_bytes: usize,
    pseudo: apportion_engine::Pseudonymizer,
    metrics: Metrics,
}

impl Repartitioner {
    fn new(cfg: &Config, metrics: Metrics) -> Result<Self> {
        let k = cfg.kafka.as_ref().context("no [kafka] section")?;
        let consumer: BaseConsumer = consumer_config(k, &format!("{}-repartition", k.group_id))
            .create()
            .context("creating the repartition consumer")?;
        let topics: Vec<&str> = k.input_topics.iter().map(String::as_str).collect();
        consumer.subscribe(&topics).context("subscribing to the input topics")?;
        let (key, _) = cfg.pseudonym_key();
        Ok(Repartitioner {
            consumer,
            producer: producer(k)?,
            topic: k.repartition_topic.clone(),
            dead_topic: k.dead_letter_topic.clone(),
            format: k.input_format,
            max_bytes: cfg.max_event_bytes,
            pseudo: apportion_engine::Pseudonymizer::new(&key),
            metrics,
        })
    }

    /// Moves up to `max` input messages to the repartition topic.
    fn pump(&mut self, max: usize, wait: Duration) -> Result<()> {
        let before = self.producer.context().failed.load(Ordering::SeqCst);
        let mut offsets: BTreeMap<(String, i32), i64> = BTreeMap::new();
        let mut n = 0;
        while n < max {
            let Some(r) = self.consumer.poll(if n == 0 { wait } else { Duration::ZERO }) else { break };
            let Ok(m) = r else { break };
            n += 1;
            offsets.insert((m.topic().to_string(), m.partition()), m.offset());
            let bytes = m.payload().unwrap_or_default();
            let parsed = match self.format {
                Format::Json => parse_event_limited(bytes, self.max_bytes),
                Format::Protobuf => crate::wire::decode_event(bytes, self.max_bytes),
            };
            match parsed {
                Ok(ev) => {
                    let key = self.pseudo.key_for(&ev.user_id).to_hex();
                    let json = crate::wire::event_to_keyed_json(&ev, &key);
                    send(&self.producer, &self.topic, Some(&key), json.as_bytes())?;
                }
                Err(rej) => {
                    self.metrics.events_rejected.with_label_values(&[rej.reason.code()]).inc();
                    self.metrics.events_consumed.with_label_values(&["unknown", "rejected"]).inc();
                    let d = apportion_sinks::DeadLetter {
                        reason: rej.reason.code().into(),
                        detail: rej.detail,
                        source: m.topic().into(),
                        partition: Some(m.partition()),
                        offset: Some(m.offset()),
                        event_id: None,
                        received_at: apportion_engine::time_fmt::format_ms(
                            std::time::SystemTime::now()
                                .duration_since(std::time::UNIX_EPOCH)
                                .map(|d| d.as_millis() as i64)
                                .unwrap_or(0),
                        ),
                    };
                    let bytes = crate::wire::encode_dead_letter(Format::Json, &d);
                    send(&self.producer, &self.dead_topic, None, &bytes)?;
                }
            }
        }
        if n == 0 {
            return Ok(());
        }
        flush_checked(&self.producer, before, "kafka").map_err(|e| anyhow::anyhow!("{e}"))?;
        let mut tpl = TopicPartitionList::new();
        for ((t, p), o) in offsets {
            tpl.add_partition_offset(&t, p, Offset::Offset(o + 1))?;
        }
        self.consumer.commit(&tpl, CommitMode::Sync).context("committing repartition offsets")?;
        Ok(())
    }
}
