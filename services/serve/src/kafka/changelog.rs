//! The changelog topics: every commit of a partition's state published to
//! `<group_id>-<topic>-changelog` (compacted, partitioned like the input,
//! the store's own key as message key; a value is [`RECORD_FORMAT`] then
//! the store's bytes, and a removal is a tombstone, a null value), and a
//! partition's state restored from it when this instance's copy is missing
//! or older (docs/contract.md, "State across instances").

use std::collections::BTreeSet;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{bail, Context, Result};
use apportion_store::{ChangeSet, Store, COMMIT_MARKER};
use rdkafka::consumer::{BaseConsumer, Consumer, ConsumerGroupMetadata};
use rdkafka::error::KafkaError;
use rdkafka::message::Message;
use rdkafka::producer::{BaseProducer, BaseRecord, DeliveryResult, Producer, ProducerContext};
use rdkafka::{ClientContext, Offset, TopicPartitionList};

use super::base_config;
use super::txn::Txn;
use crate::config::KafkaConfig;
use crate::metrics::Metrics;
use crate::pipeline::changelog::{Changelog, InputPositions, PublishError};
use crate::source::PartId;

/// The first byte of every changelog value (its format version).
pub const RECORD_FORMAT: u8 = 1;

/// Not a marker (the delivery report of an ordinary record).
pub(crate) const NO_MARKER: usize = usize::MAX;

/// How long a restore may go without reading anything before it fails.
const RESTORE_STALL: Duration = Duration::from_secs(120);

/// Delivery reports of the changelog producer: the offset of each
/// publication's markers, and failures.
#[derive(Default)]
pub struct MarkerDelivery {
    markers: Mutex<Vec<Option<i64>>>,
    failed: AtomicU64,
    last: Mutex<Option<String>>,
}

impl ClientContext for MarkerDelivery {}

impl ProducerContext for MarkerDelivery {
    type DeliveryOpaque = usize;
    fn delivery(&self, result: &DeliveryResult<'_>, marker: usize) {
        match result {
            Ok(m) if marker != NO_MARKER => {
                if let Some(slot) = self.markers.lock().expect("markers").get_mut(marker) {
                    *slot = Some(m.offset());
                }
            }
            Ok(_) => {}
            Err((e, _)) => {
                self.failed.fetch_add(1, Ordering::SeqCst);
                *self.last.lock().expect("last error") = Some(e.to_string());
            }
        }
    }
}

/// The changelog topics of one consumer group.
pub struct KafkaChangelog {
    kafka: KafkaConfig,
    producer: Mutex<BaseProducer<MarkerDelivery>>,
    /// With exactly-once delivery: every publication goes through the
    /// instance's transactions, with the batch's output and offsets.
    txn: Option<Arc<Txn>>,
    metrics: Metrics,
    /// Changelog topics known to exist with the right partition count.
    checked: Mutex<BTreeSet<String>>,
}

/// The changelog producer's configuration: a producer's, compressed with
/// lz4 unless `[kafka.properties]` names a compression.
pub(super) fn changelog_producer_config(k: &KafkaConfig) -> rdkafka::config::ClientConfig {
    let mut c = super::producer_config(k);
    if !k.properties.contains_key("compression.type") {
        c.set("compression.type", "lz4");
    }
    c
}

fn changelog_producer(k: &KafkaConfig) -> Result<BaseProducer<MarkerDelivery>> {
    changelog_producer_config(k)
        .create_with_context(MarkerDelivery::default())
        .context("creating the changelog producer")
}

impl KafkaChangelog {
    /// The changelog of the group `kafka.group_id`.
    pub fn new(kafka: &KafkaConfig, metrics: &Metrics, txn: Option<Arc<Txn>>) -> Result<Self> {
        Ok(KafkaChangelog {
            producer: Mutex::new(changelog_producer(kafka)?),
            txn,
            kafka: kafka.clone(),
            metrics: metrics.clone(),
            checked: Mutex::new(BTreeSet::new()),
        })
    }

    /// Creates the changelog topic of `source` (compacted, as many
    /// partitions as `source`) unless it exists; an existing one must have
    /// that many partitions.
    pub fn ensure_topic(&self, source: &str) -> Result<()> {
        let name = self.kafka.changelog_topic(source);
        if self.checked.lock().expect("checked").contains(&name) {
            return Ok(());
        }
        let probe: BaseConsumer = base_config(&self.kafka).create().context("creating a Kafka client")?;
        let partitions = |topic: &str| -> Result<Option<i32>> {
            let md = probe
                .fetch_metadata(Some(topic), Duration::from_secs(10))
                .with_context(|| format!("reading the metadata of topic {topic}"))?;
            Ok(md
                .topics()
                .iter()
                .find(|t| t.name() == topic && t.error().is_none())
                .map(|t| t.partitions().len() as i32)
                .filter(|n| *n > 0))
        };
        let want = partitions(source)?.with_context(|| format!("input topic {source} has no partitions yet"))?;
        if partitions(&name)?.is_none() {
            let hint =
                format!("create it with cleanup.policy=compact and {want} partitions, or set kafka.changelog = false");
            super::create_compacted_topic(&self.kafka, &name, want, &[], "changelog topic", &hint)?;
        }
        // Metadata of a new topic can take a moment to show everywhere.
        let deadline = Instant::now() + Duration::from_secs(30);
        loop {
            match partitions(&name)? {
                Some(n) if n == want => break,
                Some(n) => bail!(
                    "the changelog topic {name} has {n} partitions and input topic {source} has {want}: a changelog is partitioned like its input; recreate it with {want}"
                ),
                None if Instant::now() < deadline => std::thread::sleep(Duration::from_millis(200)),
                None => bail!("the changelog topic {name} does not show in the metadata"),
            }
        }
        self.checked.lock().expect("checked").insert(name);
        Ok(())
    }

    /// Makes this instance's copy of `id`'s state the changelog's before the
    /// partition opens: nothing to do when it reflects the changelog's last
    /// record; restored from the changelog when it is missing or older; and
    /// published when the changelog is empty but a local state exists (the
    /// first start with `kafka.changelog = true`).
    pub fn prepare_partition(&self, store: &Store, id: &PartId) -> Result<()> {
        self.ensure_topic(&id.source)?;
        let topic = self.kafka.changelog_topic(&id.source);
        let name = id.store_name();
        // librdkafka wants a group id even for a manual assignment; this
        // one never joins a group nor commits.
        let reader: BaseConsumer = base_config(&self.kafka)
            .set("group.id", format!("{}-restore", self.kafka.group_id))
            .set("enable.auto.commit", "false")
            .set("enable.partition.eof", "true")
            .set("isolation.level", "read_committed")
            .create()
            .context("creating the changelog reader")?;
        // The log's end (high watermark), asked by a read_uncommitted
        // client: a read_committed one is told the last stable offset,
        // which stops short of a transaction still open. The restore
        // then waits for that transaction to end (committed or aborted).
        let probe: BaseConsumer = base_config(&self.kafka)
            .set("group.id", format!("{}-restore", self.kafka.group_id))
            .set("isolation.level", "read_uncommitted")
            .create()
            .context("creating a Kafka client")?;
        let (low, high) = probe
            .fetch_watermarks(&topic, id.partition, Duration::from_secs(10))
            .with_context(|| format!("reading the offsets of {topic} partition {}", id.partition))?;
        let local = store.changelog_offset(&name)?;
        if high <= low {
            let records = if store.has_partition(&name) { store.partition_records(&name)? } else { Vec::new() };
            if !records.is_empty() {
                tracing::info!(partition = %name, records = records.len(), "the changelog is empty and a local state exists: publishing it");
                let mut set = ChangeSet::default();
                for (k, v) in records {
                    set.set(k, v);
                }
                let offset = self.publish(&[(id, vec![&set])])?[0];
                store.set_changelog_offset(&name, offset)?;
                store.flush()?;
            }
            return Ok(());
        }
        match local {
            // A transaction's commit record follows its last marker.
            Some(l) if l == high - 1 || (self.txn.is_some() && l == high - 2) => {
                tracing::info!(partition = %name, changelog_offset = l, "the local state is the changelog's last commit");
                return Ok(());
            }
            Some(l) if l >= high => tracing::warn!(
                partition = %name, local = l, changelog_end = high,
                "the local state is ahead of its changelog (was the changelog topic recreated?); restoring from the changelog"
            ),
            _ => {}
        }
        self.restore(&reader, store, id, &topic, low, high)
    }

    fn restore(
        &self,
        reader: &BaseConsumer,
        store: &Store,
        id: &PartId,
        topic: &str,
        low: i64,
        high: i64,
    ) -> Result<()> {
        let name = id.store_name();
        self.metrics.changelog_restoring.inc();
        self.metrics.changelog_remaining.set(high - low);
        let _restoring = scopeguard(|| {
            self.metrics.changelog_restoring.dec();
            self.metrics.changelog_remaining.set(0);
        });
        let started = Instant::now();
        tracing::info!(partition = %name, changelog = %topic, from = low, to = high, "restoring the partition from its changelog");
        let mut tpl = TopicPartitionList::new();
        tpl.add_partition_offset(topic, id.partition, Offset::Offset(low))?;
        reader.assign(&tpl).context("assigning the changelog partition")?;
        let mut restore = store.restore(&name)?;
        let mut last = low - 1;
        let mut read = 0u64;
        let mut progress = Instant::now();
        while last < high - 1 {
            match reader.poll(Duration::from_millis(500)) {
                Some(Ok(m)) => {
                    let key = m.key().with_context(|| {
                        format!("changelog record {topic}/{} at offset {} has no key", id.partition, m.offset())
                    })?;
                    // A null value is a tombstone (compaction drops it after
                    // delete.retention.ms).
                    let value = match m.payload() {
                        None => None,
                        Some([RECORD_FORMAT, rest @ ..]) => Some(rest),
                        Some(other) => bail!(
                            "changelog record {topic}/{} at offset {} has format {:?}, this build reads {RECORD_FORMAT}",
                            id.partition,
                            m.offset(),
                            other.first()
                        ),
                    };
                    restore.record(key, value)?;
                    last = m.offset();
                    read += 1;
                    if read % 4096 == 0 {
                        self.metrics.changelog_remaining.set(high - 1 - last);
                    }
                    progress = Instant::now();
                }
                Some(Err(KafkaError::PartitionEOF(_))) => {
                    // The end: compaction may have removed the last offsets.
                    match reader.position()?.find_partition(topic, id.partition).map(|p| p.offset()) {
                        Some(Offset::Offset(p)) if p >= high => break,
                        _ => {}
                    }
                }
                Some(Err(e)) => tracing::warn!(error = %e, "reading the changelog"),
                None => {}
            }
            if progress.elapsed() > RESTORE_STALL {
                bail!(
                    "restoring partition {name} from {topic}: nothing read for {}s at offset {} of {high}",
                    RESTORE_STALL.as_secs(),
                    last + 1
                );
            }
        }
        let restored = restore.finish(high - 1)?;
        self.metrics.changelog_records.with_label_values(&["restored"]).inc_by(read);
        if !restored.undo.is_empty() {
            // The log ends with part of a commit that was never finished:
            // its keys go back to the restored values before anything else
            // is published, or a later marker would cover them.
            tracing::warn!(partition = %name, keys = restored.undo.len(), "the changelog ends with an unfinished commit; publishing its undo");
            let offset = self.publish(&[(id, vec![&restored.undo])])?[0];
            store.set_changelog_offset(&name, offset)?;
            store.flush()?;
        }
        tracing::info!(
            partition = %name, records = read, applied = restored.applied, seconds = started.elapsed().as_secs_f64(),
            "partition restored from its changelog"
        );
        Ok(())
    }
}

/// Runs `f` when dropped.
fn scopeguard<F: FnOnce()>(f: F) -> impl Drop {
    struct Guard<F: FnOnce()>(Option<F>);
    impl<F: FnOnce()> Drop for Guard<F> {
        fn drop(&mut self) {
            if let Some(f) = self.0.take() {
                f();
            }
        }
    }
    Guard(Some(f))
}

impl KafkaChangelog {
    /// Publishes `parts` in this thread's transaction, and `input`'s offsets
    /// as the consumer group's when it names the group the batch was read
    /// in; then commits.
    fn publish_in(
        &self,
        txn: &Txn,
        parts: &[(&PartId, Vec<&ChangeSet>)],
        input: &InputPositions<'_>,
    ) -> Result<Vec<i64>> {
        let mut sent = 0;
        if !parts.is_empty() {
            sent = txn.with_open(|p| send_records(p, &self.kafka, parts))?.map_err(|e| {
                // What was sent is aborted with the rest.
                let _ = txn.abort();
                crate::pipeline::changelog::Aborted(e)
            })?;
        }
        let group = input.group.and_then(|g| g.downcast_ref::<ConsumerGroupMetadata>());
        if let (Some(group), false) = (group, input.offsets.is_empty()) {
            let mut tpl = TopicPartitionList::new();
            for (id, through) in &input.offsets {
                tpl.add_partition_offset(&id.source, id.partition, Offset::Offset(through + 1))?;
            }
            if let Err(e) = txn.send_offsets(&tpl, group) {
                let _ = txn.abort();
                return Err(e);
            }
        }
        let markers = txn.commit_then(|p| match parts.is_empty() {
            true => Ok(Vec::new()),
            false => markers(p),
        })?;
        self.metrics.changelog_records.with_label_values(&["published"]).inc_by(sent);
        markers.map_err(anyhow::Error::msg)
    }
}

impl Changelog for KafkaChangelog {
    fn publish_batch(&self, parts: &[(&PartId, Vec<&ChangeSet>)], input: &InputPositions<'_>) -> Result<Vec<i64>> {
        match &self.txn {
            Some(txn) => self.publish_in(txn, parts, input),
            None => self.publish(parts),
        }
    }

    fn publish(&self, parts: &[(&PartId, Vec<&ChangeSet>)]) -> Result<Vec<i64>> {
        if let Some(txn) = &self.txn {
            return self.publish_in(txn, parts, &InputPositions { offsets: Vec::new(), group: None });
        }
        let mut producer = self.producer.lock().expect("changelog producer");
        let result = publish_with(&producer, &self.kafka, parts);
        match result {
            Ok(n) => {
                self.metrics.changelog_records.with_label_values(&["published"]).inc_by(n.1);
                Ok(n.0)
            }
            Err(e) => {
                // A new producer for the next attempt (new connections, a new
                // producer id), as the output sink does.
                if let Ok(fresh) = changelog_producer(&self.kafka) {
                    *producer = fresh;
                }
                Err(PublishError(e).into())
            }
        }
    }

    fn transactional(&self) -> bool {
        self.txn.is_some()
    }
}

/// Sends every record and marker and waits for all of them; the markers'
/// offsets and the number of records.
fn publish_with(
    p: &BaseProducer<MarkerDelivery>,
    k: &KafkaConfig,
    parts: &[(&PartId, Vec<&ChangeSet>)],
) -> std::result::Result<(Vec<i64>, u64), String> {
    let before = p.context().failed.load(Ordering::SeqCst);
    let sent = send_records(p, k, parts)?;
    p.flush(Duration::from_secs(60)).map_err(|e| format!("flush: {e}"))?;
    let failed = p.context().failed.load(Ordering::SeqCst) - before;
    if failed > 0 {
        let last = p.context().last.lock().expect("last error").clone().unwrap_or_default();
        return Err(format!("{failed} records not delivered: {last}"));
    }
    Ok((markers(p)?, sent))
}

/// Sends every record and marker (not waiting); the number sent.
fn send_records(
    p: &BaseProducer<MarkerDelivery>,
    k: &KafkaConfig,
    parts: &[(&PartId, Vec<&ChangeSet>)],
) -> std::result::Result<u64, String> {
    *p.context().markers.lock().expect("markers") = vec![None; parts.len()];
    let mut sent = 0u64;
    let mut buf = Vec::new();
    for (i, (id, sets)) in parts.iter().enumerate() {
        let topic = k.changelog_topic(&id.source);
        for (key, value) in sets.iter().flat_map(|s| s.iter()) {
            let rec = BaseRecord::with_opaque_to(&topic, NO_MARKER).partition(id.partition).key(key);
            match value {
                Some(v) => {
                    buf.clear();
                    buf.push(RECORD_FORMAT);
                    buf.extend_from_slice(v);
                    send(p, rec.payload(&buf[..]))?;
                }
                None => send(p, rec)?,
            }
            sent += 1;
        }
        send(
            p,
            BaseRecord::with_opaque_to(&topic, i)
                .partition(id.partition)
                .key(COMMIT_MARKER)
                .payload(&[RECORD_FORMAT][..]),
        )?;
        sent += 1;
    }
    Ok(sent)
}

/// The offsets of the markers of the last records sent (all delivered).
fn markers(p: &BaseProducer<MarkerDelivery>) -> std::result::Result<Vec<i64>, String> {
    let markers = p.context().markers.lock().expect("markers").clone();
    let offsets: Option<Vec<i64>> = markers.into_iter().collect();
    offsets.ok_or_else(|| "a commit marker has no delivery report".to_string())
}

fn send(p: &BaseProducer<MarkerDelivery>, rec: BaseRecord<'_, [u8], [u8], usize>) -> std::result::Result<(), String> {
    super::sink::send_waiting(p, rec).map_err(|e| e.to_string())
}
