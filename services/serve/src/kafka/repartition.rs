//! Stage 1 for input not keyed by user: validates each event, replaces the
//! raw user id with its pseudonymous key (so no raw id reaches the internal
//! topic) and re-produces it keyed by that key, so that a user's events meet
//! on one partition of the repartition topic.
//!
//! ## Event time across the repartition
//!
//! A partition of the repartition topic mixes events of every input
//! partition. Its watermark must not run ahead of an input partition that
//! is behind (catching up a backlog), or that partition's events would
//! arrive late. So every record carries its input partition (`source`),
//! the largest event time read from that partition so far and whether that
//! partition was caught up (read to its end); after each pump a *progress*
//! record with the same facts for every input partition read is sent to
//! every partition of the repartition topic. Stage 2 keeps the latest
//! progress of every input partition and takes its watermark from the
//! slowest one that still has a backlog ([`SourceClocks`]): a function of
//! its own message sequence, so a redelivery repeats it.
//!
//! ## Exactly-once (`kafka.delivery = "exactly_once"`)
//!
//! Each pump is one Kafka transaction of the stage's own transactional
//! producer (`transactional.id` `<group_id>-<instance_id>-repartition`):
//! the repartitioned events, the dead letters, the progress records and the
//! input offsets (`send_offsets_to_transaction` with the stage consumer's
//! group metadata, KIP-447). Stage 2 reads the repartition topic with
//! read_committed, so an event is repartitioned once however often the
//! stage crashes: the records of a transaction that did not commit are never
//! read, and its input is read again from the offsets of the last one that
//! did. A member that lost its partitions in a rebalance and still sends is
//! refused by the group coordinator (its generation is old), so its
//! transaction aborts. Nothing blocks the stage's consumer in a rebalance
//! (no hook waits), so the offsets in the transaction never wait for a
//! rebalance this thread would have to serve; a call that fails aborts.
//! A stage fenced by a newer producer with the same `transactional.id`
//! stops the instance.
//!
//! ## Failures
//!
//! A failed produce, flush, offset commit or transaction does not stop the
//! service: the stage aborts its transaction (exactly-once), waits
//! (exponential backoff up to 30 s), rewinds its consumer to the last
//! committed input offsets, takes back the progress of the failed pump and
//! reads the same messages again. Without transactions it does so with a
//! new producer (one that failed to deliver may stay stuck); offsets are
//! then committed asynchronously: no call of the stage waits without a time
//! limit, so a broker restart during a rebalance cannot stall it. Messages
//! produced twice (at-least-once) are the same records; stage 2 drops the
//! second copy of an event as a duplicate.

use std::collections::{BTreeMap, BTreeSet};
use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

use anyhow::{Context, Result};
use apportion_contract::{RejectReason, Rejection};
use rdkafka::consumer::{BaseConsumer, CommitMode, Consumer};
use rdkafka::message::Message;
use rdkafka::producer::{BaseProducer, Producer};
use rdkafka::{Offset, TopicPartitionList};
use serde::{Deserialize, Serialize};

use super::sink::{flush_checked, producer, send, send_to, DeliveryCounter};
use super::txn::CALL_TIMEOUT;
use super::{consumer_config, encode, producer_config};
use crate::config::{Config, Format};
use crate::metrics::Metrics;
use crate::pipeline::emit::dead_letter;
use crate::pipeline::{decode, now_ms, policy};
use crate::source::ErrorLog;
use crate::source::{PartId, Payload};

/// What stage 1 knows of one input partition, as carried by the records.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct SourceProgress {
    /// Largest event time read from it (`i64::MIN`: none yet).
    pub max_ts: i64,
    /// It was read to its end.
    pub caught_up: bool,
}

/// The progress fields a repartitioned event carries besides the event.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Carried {
    /// The input partition (`topic/partition`).
    pub source: String,
    /// Its progress after this event.
    pub progress: SourceProgress,
}

/// A progress record: `{"progress":{"source":...,"max_ts":...,"caught_up":...}}`.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
struct ProgressRecord {
    progress: ProgressBody,
}

#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
struct ProgressBody {
    source: String,
    max_ts: i64,
    caught_up: bool,
}

/// Reads the progress record of a repartition message, if it is one.
pub fn read_progress(bytes: &[u8]) -> Option<Carried> {
    if !bytes.starts_with(b"{\"progress\":") {
        return None;
    }
    let r: ProgressRecord = serde_json::from_slice(bytes).ok()?;
    Some(Carried {
        source: r.progress.source,
        progress: SourceProgress { max_ts: r.progress.max_ts, caught_up: r.progress.caught_up },
    })
}

/// Reads the progress carried by a repartitioned event, if any.
pub fn read_carried(bytes: &[u8]) -> Option<Carried> {
    #[derive(Deserialize)]
    struct Fields {
        source: Option<String>,
        source_max_ts: Option<i64>,
        source_caught_up: Option<bool>,
    }
    let f: Fields = serde_json::from_slice(bytes).ok()?;
    Some(Carried {
        source: f.source?,
        progress: SourceProgress { max_ts: f.source_max_ts?, caught_up: f.source_caught_up.unwrap_or(false) },
    })
}

/// Stage 2's view of every input partition: the watermark it may take.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct SourceClocks(pub BTreeMap<String, SourceProgress>);

impl SourceClocks {
    /// Takes in newer progress of a source (event times never go back).
    pub fn update(&mut self, c: &Carried) {
        let e = self.0.entry(c.source.clone()).or_insert(c.progress);
        e.max_ts = e.max_ts.max(c.progress.max_ts);
        e.caught_up = c.progress.caught_up;
    }

    /// The largest event time every source with a backlog has passed: the
    /// smallest `max_ts` of the sources not caught up, or, when all are
    /// caught up, the largest of all. `None` before any progress.
    pub fn low_water(&self) -> Option<i64> {
        let behind = self.0.values().filter(|p| !p.caught_up).map(|p| p.max_ts).min();
        behind.or_else(|| self.0.values().map(|p| p.max_ts).max()).filter(|t| *t != i64::MIN)
    }
}

/// Stage 1 (see the module docs).
pub struct Repartitioner {
    consumer: BaseConsumer,
    /// Asks where input partitions end (see [`super::offsets_probe`]).
    probe: BaseConsumer,
    producer: BaseProducer<DeliveryCounter>,
    kafka: crate::config::KafkaConfig,
    topic: String,
    partitions_out: i32,
    dead_topic: String,
    format: Format,
    output_format: Format,
    max_bytes: usize,
    max_future_skew_ms: i64,
    pseudo: apportion_engine::Pseudonymizer,
    metrics: Metrics,
    errors: ErrorLog,
    progress: BTreeMap<PartId, SourceProgress>,
    retry_at: Option<Instant>,
    backoff: Duration,
    /// The stage's `transactional.id` (exactly-once delivery).
    txn: Option<String>,
    /// A transaction is begun and not yet committed or aborted.
    open: bool,
    /// Input partitions at their end, as of `caught_up_at` (network reads,
    /// so at most every [`CAUGHT_UP_EVERY`]).
    caught_up: (BTreeSet<PartId>, Option<Instant>),
}

/// The stage's producer: transactional, its transactions initialized,
/// when `txn` names a `transactional.id`.
fn stage_producer(k: &crate::config::KafkaConfig, txn: Option<&str>) -> Result<BaseProducer<DeliveryCounter>> {
    let Some(id) = txn else { return producer(k) };
    let p: BaseProducer<DeliveryCounter> = producer_config(k)
        .set("transactional.id", id)
        .create_with_context(DeliveryCounter::default())
        .context("creating the repartition stage's transactional producer")?;
    super::txn::init_transactions(&p, id)?;
    Ok(p)
}

/// How often stage 1 asks the brokers whether input partitions are at their end.
const CAUGHT_UP_EVERY: Duration = Duration::from_secs(2);

const MAX_BACKOFF: Duration = Duration::from_secs(30);

impl Repartitioner {
    /// `txn`: the stage's `transactional.id` (exactly-once delivery), whose
    /// transactions are initialized here.
    pub(crate) fn new(cfg: &Config, metrics: Metrics, txn: Option<String>) -> Result<Self> {
        let k = cfg.kafka.as_ref().context("no [kafka] section")?;
        let group = format!("{}-repartition", k.group_id);
        let consumer: BaseConsumer =
            consumer_config(k, &group).create().context("creating the repartition consumer")?;
        let topics: Vec<&str> = k.input_topics.iter().map(String::as_str).collect();
        consumer.subscribe(&topics).context("subscribing to the input topics")?;
        let md = consumer
            .fetch_metadata(Some(&k.repartition_topic), Duration::from_secs(30))
            .with_context(|| format!("reading the metadata of the repartition topic {}", k.repartition_topic))?;
        let partitions_out = md.topics().first().map_or(0, |t| t.partitions().len() as i32);
        if partitions_out == 0 {
            anyhow::bail!(
                "the repartition topic {} does not exist: create it (as many partitions as the input topics)",
                k.repartition_topic
            );
        }
        let (key, _) = cfg.pseudonym_key();
        Ok(Repartitioner {
            consumer,
            probe: super::offsets_probe(k, &group)?,
            producer: stage_producer(k, txn.as_deref())?,
            kafka: k.clone(),
            topic: k.repartition_topic.clone(),
            partitions_out,
            dead_topic: k.dead_letter_topic.clone(),
            format: k.input_format,
            output_format: k.output_format,
            max_bytes: cfg.max_event_bytes,
            max_future_skew_ms: cfg.max_future_skew.ms(),
            pseudo: apportion_engine::Pseudonymizer::new(&key),
            metrics,
            errors: ErrorLog::default(),
            progress: BTreeMap::new(),
            retry_at: None,
            backoff: Duration::from_millis(200),
            txn,
            open: false,
            caught_up: (BTreeSet::new(), None),
        })
    }

    /// Moves up to `max` input messages to the repartition topic. A failure
    /// is logged and retried later (see the module docs); only a fenced
    /// transactional producer is fatal.
    pub(crate) fn pump(&mut self, max: usize, wait: Duration) -> Result<()> {
        if self.retry_at.is_some_and(|t| Instant::now() < t) {
            return Ok(());
        }
        let progress = self.progress.clone();
        match self.try_pump(max, wait) {
            Ok(()) => {
                if self.retry_at.take().is_some() {
                    tracing::info!("the repartition stage works again");
                }
                self.backoff = Duration::from_millis(200);
            }
            Err(e) => {
                if let Some(fatal) = self.fatal() {
                    return Err(fatal);
                }
                self.metrics.sink_errors.with_label_values(&["kafka"]).inc();
                tracing::warn!(error = %format!("{e:#}"), retry_in_ms = self.backoff.as_millis() as u64, "repartition stage failed; reading the same input again after the backoff");
                self.retry_at = Some(Instant::now() + self.backoff);
                self.backoff = (self.backoff * 2).min(MAX_BACKOFF);
                if self.txn.is_some() {
                    self.abort()?;
                } else {
                    super::sink::renew(&mut self.producer, &self.kafka, "repartition");
                }
                self.rewind();
                // The failed pump's messages are read again: their progress
                // is taken again from where it was before them.
                self.progress = progress;
            }
        }
        Ok(())
    }

    /// Begins a transaction (exactly-once) unless one is open.
    fn begin(&mut self) -> Result<()> {
        if self.txn.is_some() && !self.open {
            self.producer.begin_transaction().context("beginning a repartition transaction")?;
            self.open = true;
        }
        Ok(())
    }

    /// Commits the open transaction with the input offsets `tpl`
    /// (KIP-447: the consumer's group metadata goes with them, so a member
    /// that lost the partitions cannot commit).
    fn commit(&mut self, tpl: Option<TopicPartitionList>) -> Result<()> {
        if let Some(tpl) = tpl {
            self.begin()?;
            let group = self.consumer.group_metadata().context("the repartition consumer has no group metadata")?;
            self.producer
                .send_offsets_to_transaction(&tpl, &group, CALL_TIMEOUT)
                .context("sending the input offsets to the repartition transaction")?;
        }
        if self.open {
            self.producer.commit_transaction(CALL_TIMEOUT).context("committing the repartition transaction")?;
            self.open = false;
        }
        Ok(())
    }

    /// Aborts the open transaction (its records are never read by stage 2);
    /// when the abort fails, a new producer with the same
    /// `transactional.id` is made, whose initialization aborts it.
    fn abort(&mut self) -> Result<()> {
        let open = std::mem::replace(&mut self.open, false);
        if !open {
            return Ok(());
        }
        // librdkafka's abort waits for the messages in flight, whose
        // delivery reports a BaseProducer serves only when polled.
        let _ = self.producer.flush(Duration::from_secs(10));
        match self.producer.abort_transaction(CALL_TIMEOUT) {
            Ok(()) => Ok(()),
            Err(e) => {
                if let Some(fatal) = self.fatal() {
                    return Err(fatal);
                }
                tracing::warn!(error = %e, "aborting the repartition transaction failed; starting a new transactional producer, which aborts it");
                match stage_producer(&self.kafka, self.txn.as_deref()) {
                    Ok(p) => self.producer = p,
                    Err(e) => {
                        tracing::warn!(error = %format!("{e:#}"), "cannot start a new transactional producer; the broker aborts the transaction when it times out")
                    }
                }
                Ok(())
            }
        }
    }

    /// The error that stops the instance: the transactional producer was
    /// fenced (another instance with the same `transactional.id`). Without
    /// transactions nothing is fatal: a failed producer is replaced.
    fn fatal(&self) -> Option<anyhow::Error> {
        super::txn::fenced(&self.producer, self.txn.as_deref()?)
    }

    /// Points the consumer back at the committed input offsets, so the
    /// messages of a failed pump are read again.
    fn rewind(&mut self) {
        let Ok(assigned) = self.consumer.assignment() else { return };
        let Ok(starts) = super::group_starts(&self.consumer, assigned, Duration::from_secs(10)) else { return };
        for (topic, partition, to) in starts {
            if let Err(err) = self.consumer.seek(&topic, partition, to, Duration::from_secs(10)) {
                self.errors.report("cannot rewind the repartition consumer", &err);
            }
        }
    }

    fn try_pump(&mut self, max: usize, wait: Duration) -> Result<()> {
        let before = self.producer.context().failed.load(Ordering::SeqCst);
        let mut offsets: BTreeMap<(String, i32), i64> = BTreeMap::new();
        let mut touched: BTreeSet<PartId> = BTreeSet::new();
        // Read first, so that the assignment (made inside poll) is known
        // before anything is sent.
        let mut read: Vec<(PartId, i64, i64, Vec<u8>)> = Vec::new();
        while read.len() < max {
            let m = match self.consumer.poll(if read.is_empty() { wait } else { Duration::ZERO }) {
                None => break,
                Some(Ok(m)) => m,
                Some(Err(e)) => {
                    self.errors.report("Kafka consumer error (repartition stage)", &e);
                    break;
                }
            };
            let processing_ms = m.timestamp().to_millis().unwrap_or_else(now_ms);
            read.push((
                PartId::new(m.topic(), m.partition()),
                m.offset(),
                processing_ms,
                m.payload().unwrap_or_default().to_vec(),
            ));
        }
        let n = read.len();
        // Newly assigned input partitions are announced first, as not read
        // yet: stage 2 holds its watermark until each has been read or is
        // found at its end, so none of them starts out late. (Per partition
        // of the repartition topic, records keep the order they are sent in.)
        let mut announce = Vec::new();
        if let Ok(assigned) = self.consumer.assignment() {
            for e in assigned.elements() {
                let id = PartId::new(e.topic(), e.partition());
                if !self.progress.contains_key(&id) {
                    self.progress.insert(id.clone(), SourceProgress { max_ts: i64::MIN, caught_up: false });
                    announce.push(id);
                    self.caught_up.1 = None;
                }
            }
        }
        if n > 0 || !announce.is_empty() {
            self.begin()?;
        }
        for id in &announce {
            self.send_progress(id)?;
        }
        for (id, offset, processing_ms, bytes) in &read {
            offsets.insert((id.source.clone(), id.partition), *offset);
            touched.insert(id.clone());
            let payload = Payload::Event(self.format);
            let decoded = decode::decode(payload, bytes, self.max_bytes).and_then(|(ev, k)| {
                if policy::too_far_ahead(ev.timestamp_ms, *processing_ms, self.max_future_skew_ms) {
                    Err(Rejection::new(
                        RejectReason::FutureTimestamp,
                        format!(
                            "event time {} is more than max_future_skew ahead of processing time",
                            apportion_contract::time::format_ms(ev.timestamp_ms)
                        ),
                    ))
                } else {
                    Ok((ev, k))
                }
            });
            match decoded {
                Ok((ev, _)) if ev.without_consent() => {
                    // Dropped here, so it never crosses the repartition topic
                    // (contract: Input events, Consent).
                    self.metrics.events_without_consent.with_label_values(&[ev.kind.as_str()]).inc();
                }
                Ok((ev, _)) => {
                    let p = self
                        .progress
                        .entry(id.clone())
                        .or_insert(SourceProgress { max_ts: i64::MIN, caught_up: false });
                    p.max_ts = p.max_ts.max(ev.timestamp_ms);
                    p.caught_up = false;
                    let carried = Carried { source: id.store_name(), progress: *p };
                    let key = self.pseudo.key_of(&ev);
                    let json = decode::encode_pseudonymized_with(&ev, &key, Some(&carried));
                    send(&self.producer, &self.topic, Some(&key.to_hex()), &json)?;
                }
                Err(rej) => {
                    let (kind, event_id) = decode::sniff(payload, bytes, self.max_bytes);
                    self.metrics.events_rejected.with_label_values(&[rej.reason.code()]).inc();
                    self.metrics.events_consumed.with_label_values(&[kind, "rejected"]).inc();
                    let d = dead_letter(id, *offset, &rej, event_id, now_ms());
                    let bytes = encode::dead_letter(self.output_format, &d);
                    send(&self.producer, &self.dead_topic, None, &bytes)?;
                }
            }
        }
        // Which input partitions are at their end now (a partition that
        // handed over messages in this pump is not).
        if self.caught_up.1.is_none_or(|t| t.elapsed() >= CAUGHT_UP_EVERY) {
            self.caught_up = (self.caught_up_partitions(), Some(Instant::now()));
        }
        let mut caught_up = self.caught_up.0.clone();
        if n > 0 {
            for id in &touched {
                caught_up.remove(id);
            }
        }
        for (id, p) in self.progress.iter_mut() {
            let now = caught_up.contains(id);
            if now != p.caught_up {
                p.caught_up = now;
                touched.insert(id.clone());
            }
        }
        // Progress of every input partition read (or changed), to every
        // partition of the repartition topic.
        if !touched.is_empty() {
            self.begin()?;
        }
        for id in &touched {
            self.send_progress(id)?;
        }
        let touched_any = !touched.is_empty() || !announce.is_empty();
        if n == 0 && !touched_any {
            return Ok(());
        }
        let tpl = match offsets.is_empty() {
            true => None,
            false => {
                let mut tpl = TopicPartitionList::new();
                for ((t, p), o) in offsets {
                    tpl.add_partition_offset(&t, p, Offset::Offset(o + 1))?;
                }
                Some(tpl)
            }
        };
        if self.txn.is_some() {
            // commit_transaction waits for every record and fails when one
            // was not delivered.
            return self.commit(tpl);
        }
        flush_checked(&self.producer, before, "kafka").map_err(|e| anyhow::anyhow!("{e}"))?;
        if let Some(tpl) = tpl {
            // Asynchronous on purpose: a synchronous commit waits without a
            // time limit, and while the group rejoins after a broker restart
            // it can wait for a rebalance that only this thread's next poll
            // would serve (the service then stalls for good). A commit that
            // is lost only means the same input is read again after a
            // restart or rewind; stage 2 drops the repeated events as
            // duplicates (contract: Journey rules).
            self.consumer.commit(&tpl, CommitMode::Async).context("committing repartition offsets")?;
        }
        Ok(())
    }

    /// Sends the progress of input partition `id` to every partition of the
    /// repartition topic.
    fn send_progress(&self, id: &PartId) -> Result<()> {
        let Some(p) = self.progress.get(id) else { return Ok(()) };
        let rec = ProgressRecord {
            progress: ProgressBody { source: id.store_name(), max_ts: p.max_ts, caught_up: p.caught_up },
        };
        let bytes = serde_json::to_vec(&rec).expect("progress serializes");
        for part in 0..self.partitions_out {
            send_to(&self.producer, &self.topic, Some(part), None, &bytes)?;
        }
        Ok(())
    }

    fn caught_up_partitions(&self) -> BTreeSet<PartId> {
        let mut out = BTreeSet::new();
        let Ok(positions) = self.consumer.position() else { return out };
        let committed = self.consumer.committed(Duration::from_secs(2)).ok();
        for e in positions.elements() {
            let Ok((low, high)) = self.probe.fetch_watermarks(e.topic(), e.partition(), Duration::from_millis(500))
            else {
                continue;
            };
            let pos = match e.offset() {
                Offset::Offset(p) => Some(p),
                _ => committed.as_ref().and_then(|c| c.find_partition(e.topic(), e.partition())).and_then(|c| match c
                    .offset()
                {
                    Offset::Offset(p) => Some(p),
                    _ => None,
                }),
            };
            if low == high || pos.is_some_and(|p| p >= high) {
                out.insert(PartId::new(e.topic(), e.partition()));
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn c(source: &str, max_ts: i64, caught_up: bool) -> Carried {
        Carried { source: source.into(), progress: SourceProgress { max_ts, caught_up } }
    }

    /// Derived by hand from the rule in the module docs.
    #[test]
    fn the_slowest_source_with_a_backlog_sets_the_pace() {
        let mut s = SourceClocks::default();
        assert_eq!(s.low_water(), None);
        s.update(&c("events/0", 1_000, false));
        s.update(&c("events/1", 400, false));
        assert_eq!(s.low_water(), Some(400), "events/1 is behind: its events must stay on time");
        s.update(&c("events/1", 900, true));
        assert_eq!(s.low_water(), Some(1_000), "a caught-up source does not hold the others back");
        s.update(&c("events/0", 1_200, true));
        assert_eq!(s.low_water(), Some(1_200), "all caught up: the newest");
        s.update(&c("events/0", 800, false));
        assert_eq!(s.low_water(), Some(1_200), "event time never goes back");
    }

    #[test]
    fn records_round_trip() {
        let rec = ProgressRecord { progress: ProgressBody { source: "events/3".into(), max_ts: 7, caught_up: true } };
        let bytes = serde_json::to_vec(&rec).unwrap();
        assert_eq!(read_progress(&bytes), Some(c("events/3", 7, true)));
        assert_eq!(read_progress(br#"{"type":"touch"}"#), None);
    }
}
