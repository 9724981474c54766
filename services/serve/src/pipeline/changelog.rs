//! Where each partition's commits are published before the local store
//! writes them: its changelog (a compacted Kafka topic per input topic,
//! partitioned like it; docs/contract.md, "State across instances"). The
//! changelog is the truth and the local store its copy: a partition that
//! moves to another instance is restored from it there.

use std::sync::{Arc, Condvar, Mutex};
use std::time::{Duration, Instant};

use anyhow::Result;
use apportion_store::ChangeSet;

use crate::source::PartId;

/// A publication that did not reach the changelog (the broker away, a
/// timeout): worth retrying, unlike a failure of the local store.
#[derive(Debug, thiserror::Error)]
#[error("publishing to the changelog failed: {0}")]
pub struct PublishError(pub String);

/// The batch's Kafka transaction was aborted, and the output rows sent in
/// it with it: the batch is written again from its output
/// (`kafka.delivery = "exactly_once"`).
#[derive(Debug, thiserror::Error)]
#[error("the batch's Kafka transaction was aborted ({0})")]
pub struct Aborted(pub String);

/// The batch's Kafka transaction was refused because the consumer group
/// moved on since the batch was read: another generation (a rebalance), or
/// this member was removed (it stalled past its session timeout). The
/// coordinator refuses the input offsets sent with the old generation
/// (KIP-447) and the transaction aborts: nothing of the batch is committed.
/// Its partitions are read again from their committed offsets, by this
/// instance for those it still owns, by their new owner for the others.
#[derive(Debug, thiserror::Error)]
#[error("the consumer group moved on since the batch was read ({0}); its transaction was aborted and the batch is read again")]
pub struct StaleGeneration(pub String);

/// What a source knows of the consumer group a batch was read in (the Kafka
/// consumer's group metadata: member and generation), opaque here. A
/// transactional changelog sends the batch's input offsets with it.
pub type GroupToken = Arc<dyn std::any::Any + Send + Sync>;

/// A batch's input positions: per partition the offset of the last message
/// the batch covers (committed or new), and the group it was read in.
pub struct InputPositions<'a> {
    /// Per partition in the batch's commit, the offset of its last message.
    pub offsets: Vec<(&'a PartId, i64)>,
    /// The group the batch was read in, if the source has one.
    pub group: Option<&'a GroupToken>,
}

/// A partition's changelog.
pub trait Changelog: Send + Sync {
    /// Publishes, for every partition listed, the writes of its sets in
    /// order and then an end-of-commit marker, and waits until the broker
    /// has them all. Returns each partition's marker offset, in the order
    /// given. A [`PublishError`] when some record was not delivered.
    /// A transactional changelog also commits the output sent in the
    /// batch's transaction with them, all or nothing ([`Aborted`] when
    /// not); the input offsets are among the records (the store's offset).
    fn publish(&self, parts: &[(&PartId, Vec<&ChangeSet>)]) -> Result<Vec<i64>>;

    /// [`Changelog::publish`] for a batch's commit, with the batch's input
    /// positions: a transactional changelog also commits them to the
    /// consumer group in the transaction, with the group metadata the batch
    /// was read in, so that a member the group has moved on from commits
    /// nothing ([`StaleGeneration`]).
    fn publish_batch(&self, parts: &[(&PartId, Vec<&ChangeSet>)], _input: &InputPositions<'_>) -> Result<Vec<i64>> {
        self.publish(parts)
    }

    /// True when [`Changelog::publish`] commits the batch's output with its
    /// records: it is then called for every batch, with or without records.
    fn transactional(&self) -> bool {
        false
    }
}

/// Counts the commits being written, so that a revocation can wait until
/// the partitions it takes away have every commit made so far in the
/// changelog (their next owner restores from it).
#[derive(Clone, Default)]
pub struct CommitGate {
    writing: Arc<(Mutex<usize>, Condvar)>,
}

/// One commit being written: the gate counts it until dropped.
pub struct GateTicket {
    gate: CommitGate,
}

impl CommitGate {
    /// A commit starts.
    pub fn enter(&self) -> GateTicket {
        *self.writing.0.lock().expect("gate") += 1;
        GateTicket { gate: self.clone() }
    }

    /// Waits until no commit is being written, at most `timeout`; false
    /// when one still is.
    pub fn wait_idle(&self, timeout: Duration) -> bool {
        let deadline = Instant::now() + timeout;
        let mut n = self.writing.0.lock().expect("gate");
        while *n > 0 {
            let left = deadline.saturating_duration_since(Instant::now());
            if left.is_zero() {
                return false;
            }
            n = self.writing.1.wait_timeout(n, left).expect("gate").0;
        }
        true
    }
}

impl Drop for GateTicket {
    fn drop(&mut self) {
        let mut n = self.gate.writing.0.lock().expect("gate");
        *n = n.saturating_sub(1);
        self.gate.writing.1.notify_all();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_gate_waits_for_every_ticket() {
        let gate = CommitGate::default();
        assert!(gate.wait_idle(Duration::ZERO));
        let (a, b) = (gate.enter(), gate.enter());
        assert!(!gate.wait_idle(Duration::from_millis(10)));
        drop(a);
        assert!(!gate.wait_idle(Duration::from_millis(10)));
        let g = gate.clone();
        let waiter = std::thread::spawn(move || g.wait_idle(Duration::from_secs(30)));
        std::thread::sleep(Duration::from_millis(20));
        drop(b);
        assert!(waiter.join().unwrap());
    }
}
