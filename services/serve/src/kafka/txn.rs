//! Exactly-once delivery (`kafka.delivery = "exactly_once"`, docs/contract.md,
//! "Delivery"): one transactional producer per instance, whose
//! `transactional.id` is `<group_id>-<instance_id>`. Per batch, the output
//! sink's rows, then the changelog records and the input offsets (with the
//! consumer's current group metadata, KIP-447) go into one transaction,
//! committed by the changelog's publication.
//!
//! A transaction belongs to the thread that began it until it is committed
//! or aborted; another thread (a partition's state published on assignment)
//! waits. The calls block: they run on the processing and sink threads,
//! never on the async runtime. A fatal error (the producer fenced by a newer
//! one with the same `transactional.id`) stops the instance.

use std::sync::{Condvar, Mutex, MutexGuard};
use std::thread::ThreadId;
use std::time::Duration;

use anyhow::{anyhow, Context, Result};
use rdkafka::consumer::ConsumerGroupMetadata;
use rdkafka::producer::{BaseProducer, Producer};
use rdkafka::TopicPartitionList;

use super::base_config;
use super::changelog::MarkerDelivery;
use crate::config::KafkaConfig;
use crate::pipeline::changelog::Aborted;

/// How long a transaction call may block.
const CALL_TIMEOUT: Duration = Duration::from_secs(60);

/// The instance's transactional producer.
pub struct Txn {
    inner: Mutex<Inner>,
    ended: Condvar,
    group: Mutex<Option<GroupSource>>,
    id: String,
}

/// Reads the consumer's current group metadata.
type GroupSource = Box<dyn Fn() -> Option<ConsumerGroupMetadata> + Send + Sync>;

struct Inner {
    producer: BaseProducer<MarkerDelivery>,
    /// The thread whose transaction is begun and not yet ended.
    owner: Option<ThreadId>,
}

impl Txn {
    /// Creates the producer and initializes its transactions (which
    /// fences an older producer with the same `transactional.id` and
    /// aborts its unfinished transaction).
    pub fn new(k: &KafkaConfig, store_instance: &str) -> Result<Txn> {
        let id = k.transactional_id(store_instance);
        let mut c = base_config(k);
        c.set("transactional.id", &id).set("enable.idempotence", "true").set("acks", "all");
        if !k.properties.contains_key("linger.ms") {
            c.set("linger.ms", "5");
        }
        if !k.properties.contains_key("compression.type") {
            c.set("compression.type", "lz4");
        }
        let producer: BaseProducer<MarkerDelivery> =
            c.create_with_context(MarkerDelivery::default()).context("creating the transactional Kafka producer")?;
        producer.init_transactions(CALL_TIMEOUT).map_err(|e| {
            anyhow!(
                "initializing Kafka transactions for transactional.id {id} failed: {e}; brokers without transactions (or without the rights for them) need kafka.delivery = \"at_least_once\""
            )
        })?;
        tracing::info!(transactional_id = %id, "Kafka transactions initialized (exactly-once delivery)");
        Ok(Txn {
            inner: Mutex::new(Inner { producer, owner: None }),
            ended: Condvar::new(),
            group: Mutex::new(None),
            id,
        })
    }

    /// The `transactional.id`.
    pub fn id(&self) -> &str {
        &self.id
    }

    /// Where the consumer's group metadata is read, afresh for every
    /// commit: the offsets of a transaction are committed for this member
    /// and its current generation (a rebalance changes it, also while the
    /// processing thread waits for this commit), so a member that lost its
    /// partitions cannot commit them (KIP-447).
    pub fn set_group_source(&self, source: GroupSource) {
        *self.group.lock().expect("group metadata") = Some(source);
    }

    /// The producer inside this thread's transaction (begun if none is):
    /// `f` sends records with it.
    pub fn with_open<R>(&self, f: impl FnOnce(&BaseProducer<MarkerDelivery>) -> R) -> Result<R> {
        let inner = self.own()?;
        Ok(f(&inner.producer))
    }

    /// Waits until no other thread's transaction is open, then begins one
    /// for this thread unless it has one.
    fn own(&self) -> Result<MutexGuard<'_, Inner>> {
        let me = std::thread::current().id();
        let mut inner = self.inner.lock().expect("transaction");
        while inner.owner.is_some_and(|o| o != me) {
            inner = self.ended.wait(inner).expect("transaction");
        }
        if inner.owner.is_none() {
            if let Err(e) = inner.producer.begin_transaction() {
                return Err(self.failure(&inner, "beginning a transaction", e));
            }
            inner.owner = Some(me);
        }
        Ok(inner)
    }

    /// True when this thread has a transaction open.
    pub fn is_open(&self) -> bool {
        self.inner.lock().expect("transaction").owner == Some(std::thread::current().id())
    }

    /// Commits this thread's transaction with the input `offsets` (next
    /// offsets to read, in the consumer's group). Nothing when there is no
    /// transaction and no offset (no empty transactions). An [`Aborted`]
    /// error when the transaction was aborted instead (all of it is to be
    /// sent again); any other error is fatal.
    /// `after` runs on the producer right after the commit (or when there
    /// is nothing to commit), before another thread can begin a
    /// transaction (the delivery reports of the committed records).
    pub fn commit_then<R>(
        &self,
        offsets: &TopicPartitionList,
        after: impl FnOnce(&BaseProducer<MarkerDelivery>) -> R,
    ) -> Result<R> {
        if offsets.count() == 0 && !self.is_open() {
            let inner = self.inner.lock().expect("transaction");
            return Ok(after(&inner.producer));
        }
        let mut inner = self.own()?;
        let result = (|| -> std::result::Result<(), (&'static str, rdkafka::error::KafkaError)> {
            if offsets.count() > 0 {
                let meta = self.group.lock().expect("group metadata").as_ref().and_then(|read| read());
                let Some(meta) = meta else {
                    return Err(("reading the consumer's group metadata", rdkafka::error::KafkaError::Canceled));
                };
                inner
                    .producer
                    .send_offsets_to_transaction(offsets, &meta, CALL_TIMEOUT)
                    .map_err(|e| ("sending the input offsets to the transaction", e))?;
            }
            inner.producer.commit_transaction(CALL_TIMEOUT).map_err(|e| ("committing the transaction", e))
        })();
        match result {
            Ok(()) => {
                let r = after(&inner.producer);
                self.end(&mut inner);
                Ok(r)
            }
            Err((what, e)) => {
                let err = self.failure(&inner, what, e);
                if err.is::<Aborted>() {
                    self.abort_locked(&mut inner)?;
                }
                Err(err)
            }
        }
    }

    /// Aborts this thread's transaction, if it has one (its records are
    /// never read by a read_committed consumer).
    pub fn abort(&self) -> Result<()> {
        let mut inner = self.inner.lock().expect("transaction");
        if inner.owner != Some(std::thread::current().id()) {
            return Ok(());
        }
        self.abort_locked(&mut inner)
    }

    fn abort_locked(&self, inner: &mut MutexGuard<'_, Inner>) -> Result<()> {
        let result = inner.producer.abort_transaction(CALL_TIMEOUT);
        self.end(inner);
        match result {
            Ok(()) => Ok(()),
            Err(e) => match self.fatal(inner) {
                Some(fatal) => Err(fatal),
                None => {
                    tracing::warn!(error = %e, "aborting the Kafka transaction failed; the broker aborts it when it times out");
                    Ok(())
                }
            },
        }
    }

    fn end(&self, inner: &mut MutexGuard<'_, Inner>) {
        inner.owner = None;
        self.ended.notify_all();
    }

    /// The error of a failed call: fatal when the producer is in a fatal
    /// state, else [`Aborted`].
    fn failure(&self, inner: &Inner, what: &str, e: rdkafka::error::KafkaError) -> anyhow::Error {
        self.fatal(inner).unwrap_or_else(|| Aborted(format!("{what}: {e}")).into())
    }

    fn fatal(&self, inner: &Inner) -> Option<anyhow::Error> {
        let (code, reason) = inner.producer.client().fatal_error()?;
        Some(anyhow!(
            "the Kafka transactional producer {} failed for good ({code:?}: {reason}): another instance started with the same transactional.id (kafka.instance_id), or this one was presumed dead; this instance writes nothing more and stops",
            self.id
        ))
    }
}

/// The offsets of a batch's transaction: for each partition, the next
/// offset to read.
pub fn offsets_list(offsets: &[(&crate::source::PartId, i64)]) -> Result<TopicPartitionList> {
    let mut tpl = TopicPartitionList::new();
    for (id, next) in offsets {
        tpl.add_partition_offset(&id.source, id.partition, rdkafka::Offset::Offset(*next))?;
    }
    Ok(tpl)
}
