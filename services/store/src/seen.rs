//! Duplicate detection: the event-id digests a partition remembers, held in
//! memory and persisted in bulk, one record per commit (no sled key per
//! event).
//!
//! A digest is remembered "as of" a time (the caller passes the later of the
//! event time and the watermark when the event arrived) and counts as seen
//! while that time is not before the caller's `forget_before` (watermark
//! minus the duplicate-detection horizon). Whether an id is a duplicate
//! therefore depends only on the message sequence, never on when the memory
//! or the sled records were pruned: pruning only frees what can no longer
//! match.
//!
//! Records: key `s` + the largest "as of" time in the record (8 bytes,
//! order-preserving) + a sequence number (8 bytes BE), so that pruning reads
//! only the key range of records wholly before the cutoff; value: a version
//! byte, then (digest 16 bytes BE, as-of time 8 bytes BE) per entry.
//!
//! Memory: one map entry per remembered id, 24 bytes of key and value plus
//! the hash table's control byte and spare capacity: about 40 bytes per id
//! (between 28 and 56 with the table's load), up to 1.5 times the live ids
//! between prunes (a prune runs once the map has grown by half).

// Digests of event ids, hashed with a per-process random seed (foldhash).
use foldhash::HashMap;

use crate::changes::ChangeSet;
use crate::codec::{from_ordered_i64, ordered_i64};
use crate::StoreError;

/// Key prefix of the seen records.
pub(crate) const S: u8 = b's';
/// Format version of a seen record.
const SEEN_FORMAT_VERSION: u8 = 1;
/// Entries per sled record (a batch of 50,000 events writes 13 records of
/// at most 96 KiB rather than one of 1.2 MB).
const PER_RECORD: usize = 4096;
const ENTRY: usize = 24;
/// Growth (in ids) below which no prune runs (small in unit tests, so that
/// they exercise pruning).
#[cfg(not(test))]
const PRUNE_FLOOR: usize = 1024;
#[cfg(test)]
const PRUNE_FLOOR: usize = 4;

#[derive(Debug, Default)]
pub(crate) struct Seen {
    ids: HashMap<u128, i64>,
    pending: Vec<(u128, i64)>,
    next_seq: u64,
    /// Entries left after the last prune (the next one runs once the map has
    /// grown by half of this, plus a floor).
    after_prune: usize,
    /// The cutoff of the last prune of sled records.
    pruned_before: i64,
}

fn record_key(max_as_of: i64, seq: u64) -> [u8; 17] {
    let mut k = [0u8; 17];
    k[0] = S;
    k[1..9].copy_from_slice(&ordered_i64(max_as_of));
    k[9..].copy_from_slice(&seq.to_be_bytes());
    k
}

fn corrupt(detail: &str) -> StoreError {
    StoreError::Corrupt { prefix: 's', detail: detail.into() }
}

impl Seen {
    /// Loads every seen record of `tree`.
    pub(crate) fn load(tree: &sled::Tree) -> Result<Seen, StoreError> {
        let mut seen = Seen { pruned_before: i64::MIN, ..Seen::default() };
        for item in tree.scan_prefix([S]) {
            let (k, v) = item?;
            if k.len() != 17 {
                return Err(corrupt("seen record key is not 17 bytes"));
            }
            let seq = u64::from_be_bytes(k[9..17].try_into().expect("8 bytes"));
            seen.next_seq = seen.next_seq.max(seq + 1);
            let (&version, body) = v.split_first().ok_or_else(|| corrupt("empty seen record"))?;
            if version != SEEN_FORMAT_VERSION {
                return Err(StoreError::UnknownVersion { found: version, expected: SEEN_FORMAT_VERSION });
            }
            if body.len() % ENTRY != 0 {
                return Err(corrupt("seen record length is not a multiple of 24"));
            }
            for e in body.chunks_exact(ENTRY) {
                let digest = u128::from_be_bytes(e[..16].try_into().expect("16 bytes"));
                let as_of = i64::from_be_bytes(e[16..].try_into().expect("8 bytes"));
                seen.remember(digest, as_of);
            }
        }
        seen.after_prune = seen.ids.len();
        Ok(seen)
    }

    fn remember(&mut self, digest: u128, as_of: i64) {
        let slot = self.ids.entry(digest).or_insert(as_of);
        *slot = (*slot).max(as_of);
    }

    /// True if `digest` is remembered as of `forget_before` or later;
    /// otherwise remembers it as of `as_of` and returns false.
    pub(crate) fn check_and_mark(&mut self, digest: u128, as_of: i64, forget_before: i64) -> bool {
        if self.ids.get(&digest).is_some_and(|&t| t >= forget_before) {
            return true;
        }
        self.ids.insert(digest, as_of);
        self.pending.push((digest, as_of));
        false
    }

    /// Remembered ids (including ones that no longer match, until pruned).
    pub(crate) fn len(&self) -> usize {
        self.ids.len()
    }

    /// Adds the records of the ids marked since the last call to `out`.
    pub(crate) fn persist_into(&mut self, out: &mut ChangeSet) {
        for part in self.pending.chunks(PER_RECORD) {
            let max_as_of = part.iter().map(|(_, t)| *t).max().expect("chunks are not empty");
            let mut v = Vec::with_capacity(1 + part.len() * ENTRY);
            v.push(SEEN_FORMAT_VERSION);
            for (d, t) in part {
                v.extend_from_slice(&d.to_be_bytes());
                v.extend_from_slice(&t.to_be_bytes());
            }
            out.set(&record_key(max_as_of, self.next_seq)[..], v);
            self.next_seq += 1;
        }
        self.pending.clear();
    }

    /// Frees the ids that can no longer match (remembered as of a time
    /// before `before`) once the map has grown by half since the last prune,
    /// and adds the removal of the sled records wholly before `before` to
    /// `out`. Returns the number of ids freed.
    pub(crate) fn prune(&mut self, before: i64, tree: &sled::Tree, out: &mut ChangeSet) -> Result<usize, StoreError> {
        if self.ids.len() < self.after_prune + self.after_prune / 2 + PRUNE_FLOOR || before <= self.pruned_before {
            return Ok(0);
        }
        let n = self.ids.len();
        self.ids.retain(|_, t| *t >= before);
        self.after_prune = self.ids.len();
        let end = record_key(before, 0);
        for item in tree.range(&[S][..]..&end[..]) {
            let (k, _) = item?;
            if k.len() == 17 && from_ordered_i64(&k[1..9]) < before {
                out.remove(k);
            }
        }
        self.pruned_before = before;
        Ok(n - self.ids.len())
    }
}
