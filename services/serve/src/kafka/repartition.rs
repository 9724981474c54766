//! Stage 1 for input not keyed by user: validates each event, replaces the
//! raw user id with its pseudonymous key (so no raw id reaches the internal
//! topic) and re-produces it keyed by that key, so that a user's events meet
//! on one partition of the repartition topic.

use std::collections::BTreeMap;
use std::sync::atomic::Ordering;
use std::time::Duration;

use anyhow::{Context, Result};
use rdkafka::consumer::{BaseConsumer, CommitMode, Consumer};
use rdkafka::message::Message;
use rdkafka::producer::{BaseProducer, Producer};
use rdkafka::{Offset, TopicPartitionList};

use super::sink::{flush_checked, producer, send, DeliveryCounter};
use super::{consumer_config, encode};
use crate::config::{Config, Format};
use crate::metrics::Metrics;
use crate::pipeline::emit::dead_letter;
use crate::pipeline::{decode, now_ms};
use crate::source::ErrorLog;
use crate::source::{PartId, Payload};

/// Stage 1 for input not keyed by user: validates each event, replaces the
/// raw user id with its pseudonymous key (so no raw id reaches the internal
/// topic) and re-produces it keyed by that key.
pub struct Repartitioner {
    consumer: BaseConsumer,
    producer: BaseProducer<DeliveryCounter>,
    topic: String,
    dead_topic: String,
    format: Format,
    output_format: Format,
    max_bytes: usize,
    pseudo: apportion_engine::Pseudonymizer,
    metrics: Metrics,
    errors: ErrorLog,
}

impl Repartitioner {
    pub(crate) fn new(cfg: &Config, metrics: Metrics) -> Result<Self> {
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
            output_format: k.output_format,
            max_bytes: cfg.max_event_bytes,
            pseudo: apportion_engine::Pseudonymizer::new(&key),
            metrics,
            errors: ErrorLog::default(),
        })
    }

    /// Moves up to `max` input messages to the repartition topic.
    pub(crate) fn pump(&mut self, max: usize, wait: Duration) -> Result<()> {
        let before = self.producer.context().failed.load(Ordering::SeqCst);
        let mut offsets: BTreeMap<(String, i32), i64> = BTreeMap::new();
        let mut n = 0;
        while n < max {
            let m = match self.consumer.poll(if n == 0 { wait } else { Duration::ZERO }) {
                None => break,
                Some(Ok(m)) => m,
                Some(Err(e)) => {
                    self.errors.report("Kafka consumer error (repartition stage)", &e);
                    break;
                }
            };
            n += 1;
            offsets.insert((m.topic().to_string(), m.partition()), m.offset());
            let bytes = m.payload().unwrap_or_default();
            let payload = Payload::Event(self.format);
            match decode::decode(payload, bytes, self.max_bytes) {
                Ok((ev, _)) => {
                    let key = self.pseudo.key_for(&ev.user_id);
                    let json = decode::encode_pseudonymized(&ev, &key);
                    send(&self.producer, &self.topic, Some(&key.to_hex()), &json)?;
                }
                Err(rej) => {
                    let (kind, event_id) = decode::sniff(payload, bytes);
                    self.metrics.events_rejected.with_label_values(&[rej.reason.code()]).inc();
                    self.metrics.events_consumed.with_label_values(&[kind, "rejected"]).inc();
                    let id = PartId::new(m.topic(), m.partition());
                    let d = dead_letter(&id, m.offset(), &rej, event_id, now_ms());
                    let bytes = encode::dead_letter(self.output_format, &d);
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
