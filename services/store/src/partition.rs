//! One partition's state: journeys with a write-back cache, the wake index,
//! duplicate detection, offsets and metadata, committed in one sled batch.

use std::collections::{BTreeSet, HashMap, HashSet};

use apportion_engine::{Journey, JourneyStore, UserKey};

use crate::codec::{decode_journey, encode_journey, from_ordered_i64, ordered_i64};
use crate::StoreError;

const J: u8 = b'j';
const W: u8 = b'w';
const E: u8 = b'e';
const F: u8 = b'f';
const O: u8 = b'o';
const M: u8 = b'm';

#[derive(Debug, Clone)]
struct Cached {
    journey: Option<Journey>,
    wake: Option<i64>,
    persisted_wake: Option<i64>,
    persisted_exists: bool,
    dirty: bool,
    bytes: usize,
}

/// The state of one input partition. Implements the engine's
/// [`JourneyStore`]; [`PartitionStore::commit`] writes all changes made
/// since the last commit (plus the offsets and metadata staged with
/// [`PartitionStore::stage_offset`] / [`PartitionStore::stage_meta`]) in one
/// atomic sled batch.
pub struct PartitionStore {
    tree: sled::Tree,
    db: sled::Db,
    cache: HashMap<UserKey, Cached>,
    pending_wake: BTreeSet<(i64, UserKey)>,
    pending_seen: HashMap<u128, i64>,
    staged: Vec<(Vec<u8>, Option<Vec<u8>>)>,
    bytes: usize,
    budget: usize,
    scanned_upto: i64,
    open_journeys: u64,
}

fn jkey(k: &UserKey) -> Vec<u8> {
    let mut v = Vec::with_capacity(33);
    v.push(J);
    v.extend_from_slice(&k.0);
    v
}

fn wkey(wake: i64, k: &UserKey) -> Vec<u8> {
    let mut v = Vec::with_capacity(41);
    v.push(W);
    v.extend_from_slice(&ordered_i64(wake));
    v.extend_from_slice(&k.0);
    v
}

fn journey_bytes(j: &Journey) -> usize {
    let t: usize = j
        .touches
        .iter()
        .map(|t| 96 + t.event_id.len() + t.channel.len() + t.campaign.as_ref().map_or(0, |c| c.len()))
        .sum();
    let c: usize = j.pending.iter().map(|c| 112 + c.event_id.len() + c.goal.len()).sum();
    160 + t + c
}

impl PartitionStore {
    pub(crate) fn new(tree: sled::Tree, db: sled::Db, budget: usize) -> Result<Self, StoreError> {
        let open_journeys = tree.scan_prefix([J]).count() as u64;
        Ok(PartitionStore {
            tree,
            db,
            cache: HashMap::new(),
            pending_wake: BTreeSet::new(),
            pending_seen: HashMap::new(),
            staged: Vec::new(),
            bytes: 0,
            budget,
            scanned_upto: i64::MIN,
            open_journeys,
        })
    }

    /// Open journeys (committed state plus uncommitted changes).
    pub fn open_journeys(&self) -> u64 {
        let mut n = self.open_journeys as i64;
        for c in self.cache.values().filter(|c| c.dirty) {
            match (c.persisted_exists, c.journey.is_some()) {
                (false, true) => n += 1,
                (true, false) => n -= 1,
                _ => {}
            }
        }
        n.max(0) as u64
    }

    /// Bytes held by cached journeys (approximate).
    pub fn cached_bytes(&self) -> usize {
        self.bytes
    }

    fn entry(&mut self, key: &UserKey) -> Result<&mut Cached, StoreError> {
        if !self.cache.contains_key(key) {
            let (journey, wake) = match self.tree.get(jkey(key))? {
                Some(v) => {
                    let s = decode_journey(&v)?;
                    (Some(s.journey), s.wake)
                }
                None => (None, None),
            };
            let bytes = journey.as_ref().map_or(64, journey_bytes);
            self.bytes += bytes;
            let exists = journey.is_some();
            self.cache.insert(
                *key,
                Cached { journey, wake, persisted_wake: wake, persisted_exists: exists, dirty: false, bytes },
            );
        }
        Ok(self.cache.get_mut(key).expect("just inserted"))
    }

    /// Returns true if `digest` (of an event id) was not seen before, and
    /// marks it seen as of event time `ts` (written at the next commit).
    pub fn mark_seen(&mut self, digest: u128, ts: i64) -> Result<bool, StoreError> {
        if self.pending_seen.contains_key(&digest) {
            return Ok(false);
        }
        let mut k = [0u8; 17];
        k[0] = E;
        k[1..].copy_from_slice(&digest.to_be_bytes());
        if self.tree.contains_key(k)? {
            return Ok(false);
        }
        self.pending_seen.insert(digest, ts);
        Ok(true)
    }

    /// Forgets event ids seen with event time before `before` (bounded
    /// duplicate-detection horizon). Returns how many were removed.
    pub fn prune_seen(&mut self, before: i64) -> Result<usize, StoreError> {
        let mut end = vec![F];
        end.extend_from_slice(&ordered_i64(before));
        let mut batch = sled::Batch::default();
        let mut n = 0;
        for item in self.tree.range(vec![F]..end) {
            let (k, _) = item?;
            let mut e = vec![E];
            e.extend_from_slice(&k[9..25]);
            batch.remove(e);
            batch.remove(k);
            n += 1;
        }
        self.tree.apply_batch(batch)?;
        Ok(n)
    }

    /// Stages an input offset to be committed with the next batch.
    pub fn stage_offset(&mut self, source: &str, offset: i64) {
        let mut k = vec![O];
        k.extend_from_slice(source.as_bytes());
        self.staged.push((k, Some(offset.to_be_bytes().to_vec())));
    }

    /// The committed offset of `source`.
    pub fn offset(&self, source: &str) -> Result<Option<i64>, StoreError> {
        let mut k = vec![O];
        k.extend_from_slice(source.as_bytes());
        Ok(self.tree.get(k)?.map(|v| i64::from_be_bytes(v.as_ref().try_into().unwrap_or([0; 8]))))
    }

    /// Stages a metadata blob (e.g. path statistics, watermark).
    pub fn stage_meta(&mut self, name: &str, value: Vec<u8>) {
        let mut k = vec![M];
        k.extend_from_slice(name.as_bytes());
        self.staged.push((k, Some(value)));
    }

    /// A committed metadata blob.
    pub fn meta(&self, name: &str) -> Result<Option<Vec<u8>>, StoreError> {
        let mut k = vec![M];
        k.extend_from_slice(name.as_bytes());
        Ok(self.tree.get(k)?.map(|v| v.to_vec()))
    }

    /// Writes every change since the last commit in one atomic batch. With
    /// `durable`, also waits until sled has it on disk.
    pub fn commit(&mut self, durable: bool) -> Result<(), StoreError> {
        self.commit_inner(durable, usize::MAX)
    }

    fn commit_inner(&mut self, durable: bool, chunk: usize) -> Result<(), StoreError> {
        let mut batch = sled::Batch::default();
        let mut in_batch = 0usize;
        let mut delta: i64 = 0;
        for (key, c) in self.cache.iter_mut().filter(|(_, c)| c.dirty) {
            if in_batch >= chunk {
                self.tree.apply_batch(std::mem::take(&mut batch))?;
                in_batch = 0;
            }
            in_batch += 1;
            if let Some(w) = c.persisted_wake {
                batch.remove(wkey(w, key));
            }
            match &c.journey {
                Some(j) => {
                    batch.insert(jkey(key), encode_journey(c.wake, j));
                    if let Some(w) = c.wake {
                        batch.insert(wkey(w, key), &[][..]);
                    }
                    if !c.persisted_exists {
                        delta += 1;
                    }
                }
                None => {
                    batch.remove(jkey(key));
                    if c.persisted_exists {
                        delta -= 1;
                    }
                }
            }
        }
        for (digest, ts) in &self.pending_seen {
            let d = digest.to_be_bytes();
            let mut e = vec![E];
            e.extend_from_slice(&d);
            batch.insert(e, &ordered_i64(*ts)[..]);
            let mut f = vec![F];
            f.extend_from_slice(&ordered_i64(*ts));
            f.extend_from_slice(&d);
            batch.insert(f, &[][..]);
        }
        for (k, v) in self.staged.drain(..) {
            match v {
                Some(v) => batch.insert(k, v),
                None => batch.remove(k),
            }
        }
        self.tree.apply_batch(batch)?;
        if durable {
            self.db.flush()?;
        }
        self.open_journeys = (self.open_journeys as i64 + delta).max(0) as u64;
        self.pending_seen.clear();
        self.pending_wake.clear();
        let mut removed = Vec::new();
        for (key, c) in self.cache.iter_mut() {
            if c.dirty {
                c.dirty = false;
                c.persisted_wake = c.wake;
                c.persisted_exists = c.journey.is_some();
                if c.journey.is_none() {
                    removed.push(*key);
                }
            }
        }
        for k in removed {
            if let Some(c) = self.cache.remove(&k) {
                self.bytes -= c.bytes;
            }
        }
        if self.bytes > self.budget {
            // All entries are clean now: drop them; hot users come back on demand.
            self.cache.clear();
            self.bytes = 0;
        }
        Ok(())
    }

    /// Writes the cached changes to sled only when the cache has grown past
    /// its byte budget (then evicts). For `replay`, which needs no
    /// durability between events: journeys stay in memory while they fit,
    /// and the store bounds memory when they do not.
    pub fn spill_if_over_budget(&mut self) -> Result<bool, StoreError> {
        if self.bytes > self.budget {
            // No durability needed here: smaller sled batches keep sled's
            // own memory small.
            self.commit_inner(false, 10_000)?;
            return Ok(true);
        }
        Ok(false)
    }

    /// Drops uncommitted changes (after a failed batch).
    pub fn rollback(&mut self) {
        self.cache.clear();
        self.bytes = 0;
        self.pending_seen.clear();
        self.pending_wake.clear();
        self.staged.clear();
        self.scanned_upto = i64::MIN;
    }
}

impl JourneyStore for PartitionStore {
    type Error = StoreError;

    fn load(&mut self, key: &UserKey) -> Result<Option<Journey>, StoreError> {
        Ok(self.entry(key)?.journey.clone())
    }

    fn save(&mut self, key: &UserKey, journey: Journey, wake: Option<i64>) -> Result<(), StoreError> {
        let (old_wake, old_dirty, old_bytes) = {
            let c = self.entry(key)?;
            (c.wake, c.dirty, c.bytes)
        };
        if old_dirty {
            if let Some(w) = old_wake {
                self.pending_wake.remove(&(w, *key));
            }
        }
        let present = !journey.is_empty();
        let bytes = if present { journey_bytes(&journey) } else { 64 };
        let wake = if present { wake } else { None };
        if let Some(w) = wake {
            self.pending_wake.insert((w, *key));
        }
        let c = self.cache.get_mut(key).expect("entry loaded");
        c.journey = present.then_some(journey);
        c.wake = wake;
        c.dirty = true;
        c.bytes = bytes;
        self.bytes = self.bytes + bytes - old_bytes;
        Ok(())
    }

    fn due(&mut self, watermark: i64) -> Result<Vec<UserKey>, StoreError> {
        let mut found: BTreeSet<(i64, UserKey)> = BTreeSet::new();
        if watermark > self.scanned_upto {
            let mut start = vec![W];
            start.extend_from_slice(&ordered_i64(self.scanned_upto.saturating_add(1)));
            let mut end = vec![W];
            end.extend_from_slice(&ordered_i64(watermark));
            end.extend_from_slice(&[0xff; 33]);
            let mut candidates = Vec::new();
            for item in self.tree.range(start..end) {
                let (k, _) = item?;
                let wake = from_ordered_i64(&k[1..9]);
                let key = UserKey(k[9..41].try_into().map_err(|_| StoreError::Corrupt {
                    prefix: 'w',
                    detail: "short wake key".into(),
                })?);
                candidates.push((wake, key));
            }
            for (wake, key) in candidates {
                // The cache is authoritative when it has the user.
                match self.cache.get(&key) {
                    Some(c) if c.dirty => {}
                    _ => {
                        found.insert((wake, key));
                    }
                }
            }
            self.scanned_upto = watermark;
        }
        let max_key = UserKey([0xff; 32]);
        found.extend(self.pending_wake.range(..=(watermark, max_key)).copied());
        let mut seen = HashSet::new();
        Ok(found.into_iter().filter(|(_, k)| seen.insert(*k)).map(|(_, k)| k).collect())
    }

    fn keys(&mut self) -> Result<Vec<UserKey>, StoreError> {
        // Persisted keys plus cached ones; a key whose cached state is
        // "removed" may still be listed and loads as None.
        let mut out: std::collections::BTreeSet<UserKey> =
            self.cache.iter().filter(|(_, c)| c.journey.is_some()).map(|(k, _)| *k).collect();
        for item in self.tree.scan_prefix([J]) {
            let (k, _) = item?;
            if let Ok(a) = k[1..].try_into() {
                out.insert(UserKey(a));
            }
        }
        Ok(out.into_iter().collect())
    }
}
