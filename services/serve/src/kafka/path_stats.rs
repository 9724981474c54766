//! The statistics topic, `<group_id>-path-stats`: compacted, one
//! partition. Each instance of the group publishes its partitions' path
//! statistics there once per refit round and reads the whole topic, so
//! that every instance fits its data-driven models on the same statistics
//! of every input partition ([`crate::pipeline::shared_stats`]).
//!
//! A record's key is the input partition (`<topic>/<partition>`, as in the
//! store); its value is [`VALUE_FORMAT`], the round (8 bytes, big-endian)
//! and the partition's statistics as the store encodes them. Compaction
//! keeps the latest value per partition, which is all a restarted instance
//! needs. The records are plain (not in a transaction): they feed a fit,
//! and the snapshot each partition credits with is committed with its
//! offsets as without sharing.

use std::time::Duration;

use anyhow::{Context, Result};
use apportion_engine::datadriven::PathStats;
use apportion_store::{decode_stats, encode_stats};
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::message::Message;
use rdkafka::producer::{BaseProducer, Producer};
use rdkafka::{Offset, TopicPartitionList};

use super::sink::{flush_checked, send_to, DeliveryCounter};
use crate::config::KafkaConfig;
use crate::pipeline::shared_stats::{Published, StatsExchange};
use crate::source::PartId;

/// The first byte of every value (its format version).
pub const VALUE_FORMAT: u8 = 1;

/// The largest value (bytes): a partition's statistics with many channels
/// and a Markov order of 2 or more can pass Kafka's default of 1 MB.
const MAX_VALUE_BYTES: &str = "16777216";

/// Settings of the topic when the service creates it: values up to
/// [`MAX_VALUE_BYTES`], and segments rolled every hour, so that compaction
/// (which never touches the open segment) keeps about one value per
/// partition rather than every round's since the topic began (7 days by
/// the broker's default) for a restarted instance to read.
const TOPIC_SETTINGS: [(&str, &str); 2] = [("max.message.bytes", MAX_VALUE_BYTES), ("segment.ms", "3600000")];

/// The most records one [`StatsExchange::receive`] reads (the rest come at
/// the next call).
const MAX_READ: usize = 10_000;

/// The statistics topic of one consumer group.
pub struct KafkaPathStats {
    kafka: KafkaConfig,
    topic: String,
    /// The topics the group consumes (input, or the repartition topic).
    sources: Vec<String>,
    markov_order: usize,
    producer: BaseProducer<DeliveryCounter>,
    reader: BaseConsumer,
    /// Partitions whose records were refused (another Markov order): warned once each.
    refused: std::collections::BTreeSet<String>,
}

impl KafkaPathStats {
    /// Creates the topic unless it exists and starts reading it from its
    /// beginning; `sources` are the topics whose partitions the rounds wait
    /// for.
    pub fn new(kafka: &KafkaConfig, sources: Vec<String>, markov_order: usize) -> Result<Self> {
        let topic = kafka.path_stats_topic();
        let hint = "create it with cleanup.policy=compact and 1 partition, or set kafka.shared_path_stats = false";
        super::create_compacted_topic(kafka, &topic, 1, &TOPIC_SETTINGS, "path statistics topic", hint)?;
        // librdkafka wants a group id; this reader never joins nor commits.
        let reader: BaseConsumer = super::base_config(kafka)
            .set("group.id", format!("{}-path-stats", kafka.group_id))
            .set("enable.auto.commit", "false")
            .set("enable.partition.eof", "false")
            .create()
            .context("creating the path statistics reader")?;
        let mut tpl = TopicPartitionList::new();
        tpl.add_partition_offset(&topic, 0, Offset::Beginning)?;
        reader.assign(&tpl).context("reading the path statistics topic")?;
        Ok(KafkaPathStats {
            producer: stats_producer(kafka)?,
            kafka: kafka.clone(),
            topic,
            sources,
            markov_order,
            reader,
            refused: Default::default(),
        })
    }

    /// A record's partition, round and statistics; `None` for a tombstone;
    /// an error saying what is wrong with it.
    fn decode(&self, key: Option<&[u8]>, value: Option<&[u8]>) -> Result<Option<Published>> {
        let Some(value) = value else { return Ok(None) };
        let key = key.and_then(|k| std::str::from_utf8(k).ok()).context("a key that is not <topic>/<partition>")?;
        let (source, n) = key.rsplit_once('/').context("a key that is not <topic>/<partition>")?;
        let partition: i32 = n.parse().context("a key that is not <topic>/<partition>")?;
        let (&format, rest) = value.split_first().context("an empty value")?;
        anyhow::ensure!(format == VALUE_FORMAT, "value format {format}, this version reads {VALUE_FORMAT}");
        anyhow::ensure!(rest.len() > 8, "a value of {} bytes", value.len());
        let round = i64::from_be_bytes(rest[..8].try_into().expect("8 bytes"));
        let stats = decode_stats(&rest[8..], self.markov_order)?;
        Ok(Some(Published { part: PartId::new(source, partition), round, stats }))
    }
}

/// An idempotent producer for values up to [`MAX_VALUE_BYTES`],
/// lz4-compressed unless `[kafka.properties]` names a compression.
fn stats_producer(k: &KafkaConfig) -> Result<BaseProducer<DeliveryCounter>> {
    let mut c = super::producer_config(k);
    c.set("message.max.bytes", MAX_VALUE_BYTES);
    if !k.properties.contains_key("compression.type") {
        c.set("compression.type", "lz4");
    }
    c.create_with_context(DeliveryCounter::default()).context("creating the path statistics producer")
}

impl StatsExchange for KafkaPathStats {
    fn partitions(&mut self) -> Result<Vec<PartId>> {
        let mut all = Vec::new();
        for topic in &self.sources {
            // Asked of the producer's client: the reader's connection can
            // hold a fetch long poll that the request would wait behind.
            let md = self
                .producer
                .client()
                .fetch_metadata(Some(topic), Duration::from_secs(10))
                .with_context(|| format!("reading the metadata of topic {topic}"))?;
            let t = md.topics().iter().find(|t| t.name() == topic).context("topic not in the metadata")?;
            all.extend(t.partitions().iter().map(|p| PartId::new(topic, p.id())));
        }
        Ok(all)
    }

    fn publish(&mut self, round: i64, parts: &[(&PartId, &PathStats)]) -> Result<()> {
        let before = self.producer.context().failed.load(std::sync::atomic::Ordering::SeqCst);
        let mut value = Vec::new();
        for (id, stats) in parts {
            value.clear();
            value.push(VALUE_FORMAT);
            value.extend_from_slice(&round.to_be_bytes());
            value.extend_from_slice(&encode_stats(stats));
            send_to(&self.producer, &self.topic, Some(0), Some(&id.store_name()), &value)
                .with_context(|| format!("sending to {}", self.topic))?;
        }
        if let Err(e) = flush_checked(&self.producer, before, "path-stats") {
            // A producer whose broker restarted can stay unable to deliver.
            match stats_producer(&self.kafka) {
                Ok(fresh) => self.producer = fresh,
                Err(e) => {
                    tracing::warn!(error = %format!("{e:#}"), "cannot create a new path statistics producer; keeping the old one")
                }
            }
            anyhow::bail!("{e}");
        }
        Ok(())
    }

    fn receive(&mut self) -> Result<Vec<Published>> {
        let mut got = Vec::new();
        while got.len() < MAX_READ {
            let Some(m) = self.reader.poll(Duration::ZERO) else { break };
            let m = match m {
                Ok(m) => m,
                Err(e) => {
                    tracing::warn!(error = %e, topic = %self.topic, "reading the path statistics topic failed; reading on at the next round step");
                    break;
                }
            };
            match self.decode(m.key(), m.payload()) {
                Ok(Some(p)) => got.push(p),
                Ok(None) => {}
                Err(e) => {
                    let key = String::from_utf8_lossy(m.key().unwrap_or_default()).into_owned();
                    if self.refused.insert(key.clone()) {
                        tracing::warn!(topic = %self.topic, offset = m.offset(), key = %key, error = %format!("{e:#}"), "a path statistics record was skipped (instances of one group must share the model configuration and a version that reads each other's records)");
                    }
                }
            }
        }
        Ok(got)
    }
}
