//! Exactly-once delivery (`kafka.delivery = "exactly_once"`, docs/contract.md,
//! "Delivery"): one transactional producer per instance, whose
//! `transactional.id` is `<group_id>-<instance_id>`. Per batch, the output
//! sink's rows, then the changelog records (the input offsets among them:
//! the store's offset record), then the input offsets as the consumer
//! group's (`send_offsets_to_transaction` with the group metadata the batch
//! was read in, KIP-447) go into one transaction, committed by the
//! changelog's publication. A member the group has moved on from (a
//! rebalance since the batch was read, or removed after stalling past its
//! session timeout) is refused, and its transaction aborts.
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
use rdkafka::producer::{BaseProducer, Producer, ProducerContext};
use rdkafka::TopicPartitionList;

use super::changelog::{changelog_producer_config, MarkerDelivery};
use crate::config::KafkaConfig;
use crate::pipeline::changelog::{Aborted, StaleGeneration};

/// How long a transaction call may block.
pub(crate) const CALL_TIMEOUT: Duration = Duration::from_secs(60);

/// The instance's transactional producer.
pub struct Txn {
    inner: Mutex<Inner>,
    ended: Condvar,
    id: String,
}

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
        // It carries the changelog records, and the output rows with them.
        let producer: BaseProducer<MarkerDelivery> = changelog_producer_config(k)
            .set("transactional.id", &id)
            .create_with_context(MarkerDelivery::default())
            .context("creating the transactional Kafka producer")?;
        init_transactions(&producer, &id)?;
        Ok(Txn { inner: Mutex::new(Inner { producer, owner: None }), ended: Condvar::new(), id })
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
                if self.fatal(&inner).is_some() {
                    return Err(self.failure(&inner, "beginning a transaction", e));
                }
                // An abort that did not finish: finish it, then begin.
                inner.owner = Some(me);
                self.abort_locked(&mut inner)?;
                if let Err(e) = inner.producer.begin_transaction() {
                    return Err(self.failure(&inner, "beginning a transaction", e));
                }
            }
            inner.owner = Some(me);
        }
        Ok(inner)
    }

    /// Sends `offsets` (each partition's next offset) to this thread's
    /// transaction as the consumer group's committed offsets, with the group
    /// metadata `group` the batch was read in (KIP-447). A
    /// [`StaleGeneration`] error when the group coordinator refuses them
    /// because the group moved on since (another generation, or this
    /// member removed); [`Aborted`] for another abortable error; else fatal.
    /// The caller aborts the transaction on error.
    pub fn send_offsets(&self, offsets: &TopicPartitionList, group: &ConsumerGroupMetadata) -> Result<()> {
        let inner = self.own()?;
        let Err(e) = inner.producer.send_offsets_to_transaction(offsets, group, CALL_TIMEOUT) else {
            return Ok(());
        };
        if let Some(fatal) = self.fatal(&inner) {
            return Err(fatal);
        }
        use rdkafka::types::RDKafkaErrorCode as C;
        Err(match e.rdkafka_error_code() {
            Some(C::IllegalGeneration | C::UnknownMemberId | C::FencedInstanceId | C::RebalanceInProgress) => {
                StaleGeneration(e.to_string()).into()
            }
            _ => Aborted(format!("sending the input offsets to the transaction: {e}")).into(),
        })
    }

    /// Commits this thread's transaction; nothing when it has none (no
    /// empty transactions). `after` runs on the producer right after the
    /// commit (or when there is nothing to commit), before another thread
    /// can begin a transaction (the delivery reports of the committed
    /// records). An [`Aborted`] error when the transaction was aborted
    /// instead (all of it is to be sent again); any other error is fatal.
    pub fn commit_then<R>(&self, after: impl FnOnce(&BaseProducer<MarkerDelivery>) -> R) -> Result<R> {
        let mut inner = self.inner.lock().expect("transaction");
        if inner.owner != Some(std::thread::current().id()) {
            return Ok(after(&inner.producer));
        }
        match inner.producer.commit_transaction(CALL_TIMEOUT) {
            Ok(()) => {
                let r = after(&inner.producer);
                self.end(&mut inner);
                Ok(r)
            }
            Err(e) => {
                let err = self.failure(&inner, "committing the transaction", e);
                if err.is::<Aborted>() {
                    self.abort_locked(&mut inner)?;
                } else {
                    self.end(&mut inner);
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

    /// Aborts the open transaction. The messages still in flight are
    /// waited for first (a `BaseProducer` serves their delivery reports
    /// only when polled; librdkafka's abort waits for them); an abort that
    /// fails is tried again, a few times.
    fn abort_locked(&self, inner: &mut MutexGuard<'_, Inner>) -> Result<()> {
        let mut last = None;
        for _ in 0..5 {
            let _ = inner.producer.flush(Duration::from_secs(10));
            match inner.producer.abort_transaction(CALL_TIMEOUT) {
                Ok(()) => {
                    self.end(inner);
                    return Ok(());
                }
                Err(e) => {
                    if let Some(fatal) = self.fatal(inner) {
                        self.end(inner);
                        return Err(fatal);
                    }
                    last = Some(e);
                }
            }
        }
        self.end(inner);
        tracing::warn!(error = ?last, "aborting the Kafka transaction failed; the broker aborts it when it times out");
        Ok(())
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
        fenced(&inner.producer, &self.id)
    }
}

/// Initializes the transactions of `producer`, whose `transactional.id` is
/// `id`: fences an older producer with the same id and aborts its
/// unfinished transaction.
pub(crate) fn init_transactions<C: ProducerContext>(producer: &BaseProducer<C>, id: &str) -> Result<()> {
    producer.init_transactions(CALL_TIMEOUT).map_err(|e| {
        anyhow!(
            "initializing Kafka transactions for transactional.id {id} failed: {e}; brokers without transactions (or without the rights for them) need kafka.delivery = \"at_least_once\""
        )
    })?;
    tracing::info!(transactional_id = %id, "Kafka transactions initialized (exactly-once delivery)");
    Ok(())
}

/// The error that stops the instance when the transactional producer
/// `producer` (`transactional.id` `id`) is in a fatal state: fenced by a
/// newer one with the same id.
pub(crate) fn fenced<C: ProducerContext>(producer: &BaseProducer<C>, id: &str) -> Option<anyhow::Error> {
    let (code, reason) = producer.client().fatal_error()?;
    Some(anyhow!(
        "the Kafka transactional producer {id} failed for good ({code:?}: {reason}): another instance started with the same transactional.id (kafka.instance_id), or this one was presumed dead; this instance writes nothing more and stops"
    ))
}
