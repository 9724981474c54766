//! Duplicate event ids in `replay`: the first occurrence in input order
//! wins (docs/contract.md, "Input events"), as the first arrival does in the
//! streaming service. Every caller (the `replay` command, `explain`, the
//! in-memory [`super::replay_lines`], the load tools) decides duplicates here,
//! while reading its input in input order, before sorting by time.

// Digests are SHA-256 of attacker-chosen ids, so the set hashes them with
// a per-process random seed (foldhash), not by their own bits; SipHash
// (the standard hasher) cost 7 % of a replay (load/RESULTS.md section 7).
use foldhash::{HashSet, HashSetExt};

use apportion_contract::{Event, EventKind};
use sha2::{Digest, Sha256};

/// 128-bit digest of an event id (16 bytes a remembered id instead of the
/// id itself; a collision between two of 2^64 ids is about as likely as
/// one in 2^-64, far below any input size this runs on).
pub fn event_id_digest(event_id: &str) -> u128 {
    first_128_bits(&Sha256::digest(event_id.as_bytes()))
}

fn first_128_bits(digest: &[u8]) -> u128 {
    u128::from_be_bytes(digest[..16].try_into().expect("a SHA-256 digest has 32 bytes"))
}

/// The identity of an `erase` without an `event_id`: a digest of its user
/// (raw id in `replay`, user key in `serve`: either names one user) and its
/// event time, kept apart from every event id by a leading 0xFF byte (an
/// event id is UTF-8, which never holds 0xFF). A re-sent copy of an erase
/// has the same identity and is dropped as a duplicate, so it cannot wipe
/// touches that arrived after the first (docs/contract.md, "Erase").
pub fn erase_digest(user: &[u8], timestamp_ms: i64) -> u128 {
    let mut h = Sha256::new();
    h.update([0xFF]);
    h.update(b"erase");
    h.update((user.len() as u64).to_be_bytes());
    h.update(user);
    h.update(timestamp_ms.to_be_bytes());
    first_128_bits(&h.finalize())
}

/// The identity under which an event is remembered for duplicate
/// detection: its `event_id`, or for an erase without one,
/// [`erase_digest`] of `user` and its time.
pub fn dedupe_digest(kind: EventKind, event_id: &str, user: &[u8], timestamp_ms: i64) -> u128 {
    if kind == EventKind::Erase && event_id.is_empty() {
        erase_digest(user, timestamp_ms)
    } else {
        event_id_digest(event_id)
    }
}

/// [`dedupe_digest`] of a parsed event (before pseudonymization: its raw
/// user id).
pub fn event_digest(ev: &Event) -> u128 {
    dedupe_digest(ev.kind, &ev.event_id, ev.user_id.as_bytes(), ev.timestamp_ms)
}

/// Remembers the event ids seen so far, in input order.
#[derive(Debug, Default)]
pub struct FirstSeen {
    seen: HashSet<u128>,
}

impl FirstSeen {
    /// An empty set with room for `n` ids.
    pub fn with_capacity(n: usize) -> Self {
        FirstSeen { seen: HashSet::with_capacity(n) }
    }

    /// Ids remembered.
    pub fn len(&self) -> usize {
        self.seen.len()
    }

    /// True when no id is remembered.
    pub fn is_empty(&self) -> bool {
        self.seen.is_empty()
    }

    /// Reserves room for `n` more ids.
    pub fn reserve(&mut self, n: usize) {
        self.seen.reserve(n);
    }

    /// True when this event is the first with its identity (and remembers
    /// it): its id, or for an erase without one its user and time
    /// ([`dedupe_digest`]).
    pub fn first(&mut self, ev: &Event) -> bool {
        self.first_digest(event_digest(ev))
    }

    /// [`FirstSeen::first`] for an identity already computed with
    /// [`event_digest`] (e.g. on another thread).
    pub fn first_digest(&mut self, digest: u128) -> bool {
        self.seen.insert(digest)
    }
}
