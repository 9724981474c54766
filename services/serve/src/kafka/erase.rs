//! `POST /v1/erase` in Kafka mode: the erase event of a request (by user
//! key; contract: Journey rules, Erase) is produced to **every partition of
//! every input topic**. The service cannot know which partition the
//! producers' partitioner chose for the user, so each partition gets a copy
//! and applies it in its order, like any erase; copies that meet on one
//! partition (after the repartition stage) are duplicates of each other.
//! Through the input topics the erase is durable before the request is
//! answered, reaches whichever instance owns each partition, and is
//! replayed with the rest of the input.

use std::sync::atomic::Ordering;
use std::time::Duration;

use anyhow::{Context, Result};
use rdkafka::producer::{BaseProducer, Producer};

use super::sink::{flush_checked, producer, send_to, DeliveryCounter};
use crate::config::{Config, Format};

/// Produces erase events to the input topics.
pub struct EraseSender {
    producer: BaseProducer<DeliveryCounter>,
    topics: Vec<String>,
    format: Format,
}

impl EraseSender {
    /// A producer for the input topics of `cfg`.
    pub fn new(cfg: &Config) -> Result<EraseSender> {
        let k = cfg.kafka.as_ref().context("no [kafka] section")?;
        Ok(EraseSender { producer: producer(k)?, topics: k.input_topics.clone(), format: k.input_format })
    }

    /// Produces `line` (an erase event, contract JSON) to every partition of
    /// every input topic, in the input format, and waits until all are
    /// delivered. Returns how many partitions got it. Blocking.
    pub fn send(&self, line: &[u8], key: &str) -> Result<usize> {
        let payload = match self.format {
            Format::Json => line.to_vec(),
            Format::Protobuf => {
                let text = std::str::from_utf8(line).context("the erase event is not UTF-8")?;
                apportion_wire::encode_event_protobuf(text).map_err(|e| anyhow::anyhow!("{e}"))?
            }
        };
        let before = self.producer.context().failed.load(Ordering::SeqCst);
        let mut sent = 0;
        for topic in &self.topics {
            let md = self
                .producer
                .client()
                .fetch_metadata(Some(topic), Duration::from_secs(10))
                .with_context(|| format!("reading the partitions of input topic {topic}"))?;
            let parts = md.topics().first().map_or(0, |t| t.partitions().len() as i32);
            anyhow::ensure!(parts > 0, "input topic {topic} has no partitions (does it exist?)");
            for p in 0..parts {
                send_to(&self.producer, topic, Some(p), Some(key), &payload)
                    .with_context(|| format!("producing the erase to {topic}/{p}"))?;
                sent += 1;
            }
        }
        flush_checked(&self.producer, before, "kafka").map_err(|e| anyhow::anyhow!("{e}"))?;
        Ok(sent)
    }
}
