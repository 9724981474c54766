//! The producer sink: credit rows, paths and dead letters to their topics,
//! keyed by user key (dead letters unkeyed), with an idempotent producer.

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use anyhow::{Context, Result};
use apportion_sinks::{OutputBatch, Sink, SinkError};
use rdkafka::error::KafkaError;
use rdkafka::producer::{BaseProducer, BaseRecord, DeliveryResult, Producer, ProducerContext};
use rdkafka::types::RDKafkaErrorCode;
use rdkafka::ClientContext;

use super::encode;
use crate::config::{Config, Format, KafkaConfig};

/// Counts delivery failures of the producer.
#[derive(Default, Clone)]
pub struct DeliveryCounter {
    pub(crate) failed: Arc<AtomicU64>,
    pub(crate) last: Arc<Mutex<Option<String>>>,
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
    super::producer_config(k).create_with_context(DeliveryCounter::default()).context("creating the Kafka producer")
}

/// Replaces `p` with a new producer after it failed to deliver (its
/// messages not yet delivered are purged: the caller sends them again). An
/// idempotent producer whose broker restarted can stay unable to deliver;
/// a new one starts from new connections and a new producer id.
pub(crate) fn renew(p: &mut BaseProducer<DeliveryCounter>, k: &KafkaConfig, what: &str) {
    match producer(k) {
        Ok(fresh) => {
            tracing::info!(producer = what, "replacing the Kafka producer after a failed delivery");
            *p = fresh;
        }
        Err(e) => {
            tracing::warn!(producer = what, error = %format!("{e:#}"), "cannot create a new Kafka producer; keeping the old one")
        }
    }
}

pub(crate) fn send(
    p: &BaseProducer<DeliveryCounter>,
    topic: &str,
    key: Option<&str>,
    payload: &[u8],
) -> Result<(), KafkaError> {
    send_to(p, topic, None, key, payload)
}

/// [`send`] to a chosen partition (`None`: the partitioner's, by key),
/// waiting while the producer's queue is full.
pub(crate) fn send_to(
    p: &BaseProducer<DeliveryCounter>,
    topic: &str,
    partition: Option<i32>,
    key: Option<&str>,
    payload: &[u8],
) -> Result<(), KafkaError> {
    let mut rec = BaseRecord::to(topic).payload(payload);
    if let Some(k) = key {
        rec = rec.key(k);
    }
    if let Some(part) = partition {
        rec = rec.partition(part);
    }
    send_waiting(p, rec)
}

/// Sends `rec`, waiting while the producer's queue is full.
pub(crate) fn send_waiting<C, K, P>(
    p: &BaseProducer<C>,
    mut rec: BaseRecord<'_, K, P, C::DeliveryOpaque>,
) -> Result<(), KafkaError>
where
    C: ProducerContext,
    K: rdkafka::message::ToBytes + ?Sized,
    P: rdkafka::message::ToBytes + ?Sized,
{
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

pub(crate) fn flush_checked(
    p: &BaseProducer<DeliveryCounter>,
    before: u64,
    sink: &'static str,
) -> Result<(), SinkError> {
    p.flush(Duration::from_secs(60)).map_err(|e| SinkError::retry(sink, format!("flush: {e}")))?;
    let after = p.context().failed.load(Ordering::SeqCst);
    if after > before {
        let last = p.context().last.lock().expect("slot").clone().unwrap_or_default();
        return Err(SinkError::retry(sink, format!("{} messages not delivered: {last}", after - before)));
    }
    Ok(())
}

/// Credit rows, paths and dead letters to their topics, keyed by user key.
/// With exactly-once delivery they go into the batch's transaction, which
/// the changelog's publication commits (the sink is then the last one
/// written); else the producer flushes them.
pub struct KafkaSink {
    producer: BaseProducer<DeliveryCounter>,
    txn: Option<Arc<super::txn::Txn>>,
    kafka: KafkaConfig,
    credit_topic: String,
    paths_topic: String,
    dead_topic: String,
    erasure_topic: String,
    format: Format,
}

impl KafkaSink {
    /// Builds the sink.
    pub fn new(cfg: &Config, txn: Option<Arc<super::txn::Txn>>) -> Result<KafkaSink> {
        let k = cfg.kafka.as_ref().context("no [kafka] section")?;
        Ok(KafkaSink {
            producer: producer(k)?,
            txn,
            kafka: k.clone(),
            credit_topic: k.credit_topic.clone(),
            paths_topic: k.paths_topic.clone(),
            dead_topic: k.dead_letter_topic.clone(),
            erasure_topic: k.erasure_topic.clone(),
            format: k.output_format,
        })
    }
}

impl Sink for KafkaSink {
    fn name(&self) -> &'static str {
        "kafka"
    }

    fn write(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        self.send_batch(batch)
    }

    fn close(&mut self) -> Result<(), SinkError> {
        self.producer.flush(Duration::from_secs(30)).map_err(|e| SinkError::fatal("kafka", e.to_string()))
    }

    /// After a failed write the same batch is sent again: in a new
    /// transaction, or with a new producer.
    fn reset(&mut self) {
        match &self.txn {
            Some(txn) => {
                if let Err(e) = txn.abort() {
                    tracing::warn!(error = %format!("{e:#}"), "aborting the batch's transaction");
                }
            }
            None => renew(&mut self.producer, &self.kafka, "output"),
        }
    }
}

impl KafkaSink {
    fn send_batch(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        if let Some(txn) = self.txn.clone() {
            let sent = txn.with_open(|p| {
                self.send_rows(batch, |topic, key, bytes| {
                    let mut rec = BaseRecord::with_opaque_to(topic, super::changelog::NO_MARKER).payload(bytes);
                    if let Some(k) = key {
                        rec = rec.key(k);
                    }
                    send_waiting(p, rec)
                })
            });
            return match sent {
                Ok(r) => r,
                // Fenced or otherwise failed for good: never retried.
                Err(e) if !e.is::<crate::pipeline::changelog::Aborted>() => {
                    Err(SinkError::fatal("kafka", format!("{e:#}")))
                }
                Err(e) => Err(SinkError::retry("kafka", format!("{e:#}"))),
            };
        }
        let before = self.producer.context().failed.load(Ordering::SeqCst);
        let producer = &self.producer;
        self.send_rows(batch, |topic, key, bytes| send(producer, topic, key, bytes))?;
        flush_checked(&self.producer, before, "kafka")
    }

    /// Encodes every row of the batch and hands it to `send` (topic, key,
    /// payload).
    fn send_rows(
        &self,
        batch: &OutputBatch,
        mut send: impl FnMut(&str, Option<&str>, &[u8]) -> Result<(), KafkaError>,
    ) -> Result<(), SinkError> {
        let err = |e: KafkaError| SinkError::retry("kafka", e.to_string());
        // One buffer for every row of the batch (the producer copies each).
        let mut bytes = Vec::with_capacity(1024);
        for r in &batch.credit {
            encode::credit_into(self.format, r, &mut bytes);
            send(&self.credit_topic, Some(r.user_key.hex().as_str()), &bytes).map_err(err)?;
        }
        for p in &batch.paths {
            encode::path_into(self.format, p, &mut bytes);
            send(&self.paths_topic, Some(p.user_key.hex().as_str()), &bytes).map_err(err)?;
        }
        for d in &batch.dead_letters {
            let bytes = encode::dead_letter(self.format, d);
            send(&self.dead_topic, None, &bytes).map_err(err)?;
        }
        for e in &batch.erasures {
            let bytes = serde_json::to_vec(e).expect("rows serialize");
            send(&self.erasure_topic, Some(&e.user_key.to_hex()), &bytes).map_err(err)?;
        }
        Ok(())
    }
}
