//! Duplicate event ids in `replay`: the first occurrence in input order
//! wins (docs/contract.md, "Input events"), as the first arrival does in the
//! streaming service. Every caller (the `replay` command, `explain`, the
//! in-memory [`super::replay_lines`], the load tools) decides duplicates here,
//! while reading its input in input order, before sorting by time.

use std::collections::HashSet;

use apportion_contract::EventKind;
use sha2::{Digest, Sha256};

/// 128-bit digest of an event id (16 bytes a remembered id instead of the
/// id itself; a collision between two of 2^64 ids is about as likely as
/// one in 2^-64, far below any input size this runs on).
pub fn event_id_digest(event_id: &str) -> u128 {
    let d = Sha256::digest(event_id.as_bytes());
    u128::from_be_bytes(d[..16].try_into().expect("16 bytes"))
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

    /// True when this event is the first with its id (and remembers it).
    /// `erase` events are never duplicates: their id is optional and an
    /// erase is idempotent.
    pub fn first(&mut self, kind: EventKind, event_id: &str) -> bool {
        kind == EventKind::Erase || event_id.is_empty() || self.seen.insert(event_id_digest(event_id))
    }
}
