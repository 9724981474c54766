//! One partition's state: journeys with a write-back cache, the wake index
//! (in memory), duplicate detection, offsets and metadata, committed in one sled batch.

use std::collections::BTreeSet;

// User keys are HMACs under a secret key; hashed with a per-process random
// seed (foldhash), much cheaper than SipHash on 32 bytes.
use foldhash::{HashMap, HashMapExt, HashSet, HashSetExt};

use apportion_engine::{Journey, JourneyStore, UserKey};

use apportion_engine::datadriven::PathStats;

use crate::changes::ChangeSet;
use crate::codec::{
    decode_clock, decode_journey, decode_offset, decode_stats, encode_clock, encode_journey, from_ordered_i64,
    journey_header, ordered_i64, Clock, Decision,
};
use crate::seen::Seen;
use crate::stats_keys;
use crate::StoreError;

pub(crate) const J: u8 = b'j';
/// Wake index keys that earlier builds wrote (wake time + user key); the
/// index now lives in memory, rebuilt from the journey records on open.
const W: u8 = b'w';
/// Per-event duplicate-detection keys that earlier builds wrote (the
/// digest, and an age index of it), migrated to [`Seen`] records on open.
const E: u8 = b'e';
const F: u8 = b'f';
const O: u8 = b'o';
const M: u8 = b'm';
const D: u8 = b'd';
const META_CLOCK: &str = "clock";
/// Path statistics as one record (format 1), as earlier builds kept them;
/// converted to counters (`stats_keys`) when read.
const META_STATS: &str = "stats";
const META_SNAPSHOT: &str = "snapshot";
const META_SOURCE: &str = "source";

/// A cached journey: decoded while in use, so a touch changes it in place
/// and it is encoded once per commit (only when changed), not per event;
/// encoded (the record sled holds, about half the size) once it has gone
/// cold and the cache needs room.
#[derive(Debug, Clone)]
enum Held {
    Decoded(Journey),
    Encoded(Box<[u8]>),
}

impl Held {
    fn size(&self) -> usize {
        match self {
            Held::Decoded(j) => journey_bytes(j),
            // ENTRY_OVERHEAD counts the record's allocation header.
            Held::Encoded(b) => b.len(),
        }
    }

    /// The record sled holds for this journey with wake time `wake`.
    fn record(&self, wake: Option<i64>) -> std::borrow::Cow<'_, [u8]> {
        match self {
            Held::Decoded(j) => std::borrow::Cow::Owned(encode_journey(wake, j)),
            Held::Encoded(b) => std::borrow::Cow::Borrowed(b),
        }
    }

    fn into_journey(self) -> Result<Journey, StoreError> {
        match self {
            Held::Decoded(j) => Ok(j),
            Held::Encoded(b) => Ok(decode_journey(&b)?.journey),
        }
    }
}

/// A commit collected by [`PartitionStore::prepare`], not yet written.
/// [`Prepared::write`] may run on another thread (the store's owner goes
/// on applying events meanwhile); [`PartitionStore::applied`] then finishes
/// it on the owner's.
#[derive(Debug)]
pub struct Prepared {
    changes: ChangeSet,
    /// The journeys it writes.
    written: Vec<UserKey>,
    /// The change in persisted journeys once written.
    delta: i64,
    tree: sled::Tree,
    done: bool,
    /// The changelog offset the commit is published at, recorded with it.
    changelog_offset: Option<i64>,
}

impl Prepared {
    /// Writes the commit to sled in one atomic batch (not flushed: see
    /// [`crate::Store::flush`]). Writing it twice writes the same.
    pub fn write(&mut self) -> Result<(), StoreError> {
        if !self.done {
            let mut batch = self.changes.batch();
            if let Some(o) = self.changelog_offset {
                batch.insert(crate::changelog::CHANGELOG_OFFSET_KEY, &o.to_be_bytes()[..]);
            }
            self.tree.apply_batch(batch)?;
            self.done = true;
        }
        Ok(())
    }

    /// The commit's writes (what a changelog publishes).
    pub fn changes(&self) -> &ChangeSet {
        &self.changes
    }

    /// Records, with the commit, that the local state then reflects the
    /// changelog up to `offset` (the commit's own publication).
    pub fn set_changelog_offset(&mut self, offset: i64) {
        self.changelog_offset = Some(offset);
    }
}

/// One cached user.
#[derive(Debug, Clone)]
struct Cached {
    /// The open journey; `None`: no open journey.
    journey: Option<Held>,
    /// Estimated heap bytes of `journey` (see [`Held::size`]).
    size: usize,
    wake: Option<i64>,
    persisted_exists: bool,
    dirty: bool,
    /// Access clock value of the last load or save (least recently used
    /// entries are evicted first).
    last_used: u64,
}

/// Bytes of one cache entry besides its journey: the map slot (key and
/// [`Cached`]), the hash table's control byte and spare capacity, and the
/// wake index entry (which stays, outside the budget, when the entry is
/// evicted).
const ENTRY_OVERHEAD: usize = 256;

/// Allocator bookkeeping per heap block (rounding and header), an estimate.
const ALLOC_OVERHEAD: usize = 16;

fn string_bytes(s: &str) -> usize {
    if s.is_empty() {
        0
    } else {
        s.len() + ALLOC_OVERHEAD
    }
}

/// Estimated heap bytes of a decoded journey: its vectors' slots and every
/// string it owns, each with [`ALLOC_OVERHEAD`].
fn journey_bytes(j: &Journey) -> usize {
    let touches: usize = j
        .touches
        .iter()
        .map(|t| string_bytes(&t.event_id) + string_bytes(&t.channel) + t.campaign.as_deref().map_or(0, string_bytes))
        .sum();
    let pending: usize = j
        .pending
        .iter()
        .map(|c| string_bytes(&c.event_id) + string_bytes(&c.goal) + c.currency.as_deref().map_or(0, string_bytes))
        .sum();
    let slots = j.touches.capacity() * std::mem::size_of::<apportion_engine::Touch>()
        + j.pending.capacity() * std::mem::size_of::<apportion_engine::Conversion>();
    touches + pending + slots + 2 * ALLOC_OVERHEAD
}

impl Cached {
    fn bytes(&self) -> usize {
        ENTRY_OVERHEAD + self.size
    }
}

/// The state of one input partition. Implements the engine's
/// [`JourneyStore`]; [`PartitionStore::commit`] writes all changes made
/// since the last commit (plus the offsets and metadata staged with
/// [`PartitionStore::stage_offset`] / [`PartitionStore::stage_meta`]) in one
/// atomic sled batch.
///
/// Memory: cached journeys are kept decoded while in use (an event changes
/// its journey in place; a changed journey is encoded once, at the next
/// commit) and their estimated heap size is counted against the byte
/// budget; above it, the least recently used are first encoded in memory
/// (a cold journey costs its record's size), and if that is not enough,
/// the least recently used entries are evicted (after
/// [`PartitionStore::commit`], or written to sled first by
/// [`PartitionStore::spill_if_over_budget`]), until a quarter of the
/// budget is free again. sled's own memory grows with the number of records it
/// holds, so only the overflow goes there.
pub struct PartitionStore {
    tree: sled::Tree,
    db: sled::Db,
    cache: HashMap<UserKey, Cached>,
    /// The wake index of every open journey (committed or not): the wake
    /// time each record carries, in memory (rebuilt from the records on
    /// open), so no sled key is written per wake change.
    wakes: BTreeSet<(i64, UserKey)>,
    seen: Seen,
    staged: ChangeSet,
    /// Journeys of a prepared commit not yet applied (their entries stay
    /// in the cache until it is).
    unapplied: HashSet<UserKey>,
    bytes: usize,
    budget: usize,
    /// Journeys persisted in sled (committed state).
    open_journeys: u64,
    clock: u64,
    /// Journeys written to sled because they were evicted with changes.
    spilled: u64,
    /// Replay mode: spill least recently used journeys to sled from `save`
    /// when over budget (checked every [`AUTO_SPILL_EVERY`] saves).
    auto_spill: bool,
    saves: u64,
}

/// How often (in saves) a store in replay mode checks its budget.
const AUTO_SPILL_EVERY: u64 = 1024;

fn meta_key(name: &str) -> Vec<u8> {
    let mut k = vec![M];
    k.extend_from_slice(name.as_bytes());
    k
}

fn jkey(k: &UserKey) -> Vec<u8> {
    let mut v = Vec::with_capacity(33);
    v.push(J);
    v.extend_from_slice(&k.0);
    v
}

impl PartitionStore {
    pub(crate) fn new(tree: sled::Tree, db: sled::Db, budget: usize) -> Result<Self, StoreError> {
        migrate_seen_keys(&tree)?;
        drop_wake_keys(&tree)?;
        let mut wakes = BTreeSet::new();
        let mut open_journeys = 0;
        for item in tree.scan_prefix([J]) {
            let (k, v) = item?;
            let key = UserKey(
                k[1..]
                    .try_into()
                    .map_err(|_| StoreError::Corrupt { prefix: 'j', detail: "user key is not 32 bytes".into() })?,
            );
            if let (Some(w), _) = journey_header(&v)? {
                wakes.insert((w, key));
            }
            open_journeys += 1;
        }
        let seen = Seen::load(&tree)?;
        Ok(PartitionStore {
            tree,
            db,
            cache: HashMap::new(),
            wakes,
            seen,
            staged: ChangeSet::default(),
            unapplied: HashSet::new(),
            bytes: 0,
            budget,
            open_journeys,
            clock: 0,
            spilled: 0,
            auto_spill: false,
            saves: 0,
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

    /// Bytes held by cached journeys (their estimated heap size plus a fixed
    /// per-entry overhead).
    pub fn cached_bytes(&self) -> usize {
        self.bytes
    }

    /// Evicted entries that had to be written to sled first because they
    /// held uncommitted changes (only `spill_if_over_budget` evicts those).
    pub fn spilled(&self) -> u64 {
        self.spilled
    }

    fn entry(&mut self, key: &UserKey) -> Result<&mut Cached, StoreError> {
        self.clock += 1;
        let clock = self.clock;
        if !self.cache.contains_key(key) {
            // Nothing persisted yet: no need to ask sled (the common case
            // of a replay whose journeys fit in memory).
            let stored = if self.open_journeys == 0 { None } else { self.tree.get(jkey(key))? };
            // Decoded once: the caller is about to take or read it.
            let (journey, wake) = match stored {
                Some(v) => {
                    let stored = decode_journey(&v)?;
                    (Some(Held::Decoded(stored.journey)), stored.wake)
                }
                None => (None, None),
            };
            let exists = journey.is_some();
            let size = journey.as_ref().map_or(0, Held::size);
            let c = Cached { journey, size, wake, persisted_exists: exists, dirty: false, last_used: clock };
            self.bytes += c.bytes();
            self.cache.insert(*key, c);
        }
        let c = self.cache.get_mut(key).expect("just inserted");
        c.last_used = clock;
        Ok(c)
    }

    /// Returns true if `digest` (of an event id) is new: not remembered as
    /// of `forget_before` or later. A new digest is remembered as of `as_of`
    /// (written at the next commit, in bulk). Callers pass the later of the
    /// event time and the watermark as `as_of`, and the watermark minus the
    /// duplicate-detection horizon as `forget_before`.
    pub fn mark_seen(&mut self, digest: u128, as_of: i64, forget_before: i64) -> bool {
        !self.seen.check_and_mark(digest, as_of, forget_before)
    }

    /// Event ids held in memory for duplicate detection.
    pub fn remembered_ids(&self) -> usize {
        self.seen.len()
    }

    /// Frees remembered event ids that can no longer match (remembered as of
    /// a time before `before`) in memory, once enough have accumulated (it
    /// costs a pass over all of them), and stages the removal of their sled
    /// records for the next commit. Returns how many were freed. Never
    /// changes which ids count as duplicates.
    pub fn prune_seen(&mut self, before: i64) -> Result<usize, StoreError> {
        self.seen.prune(before, &self.tree, &mut self.staged)
    }

    /// Stages an input offset to be committed with the next batch.
    pub fn stage_offset(&mut self, source: &str, offset: i64) {
        let mut k = vec![O];
        k.extend_from_slice(source.as_bytes());
        self.staged.set(k, &offset.to_be_bytes()[..]);
    }

    /// The committed offset of `source`.
    pub fn offset(&self, source: &str) -> Result<Option<i64>, StoreError> {
        let mut k = vec![O];
        k.extend_from_slice(source.as_bytes());
        self.tree.get(k)?.map(|v| decode_offset(&v)).transpose()
    }

    fn stage_meta(&mut self, name: &str, value: Vec<u8>) {
        self.staged.set(meta_key(name), value);
    }

    fn meta(&self, name: &str) -> Result<Option<sled::IVec>, StoreError> {
        Ok(self.tree.get(meta_key(name))?)
    }

    /// The committed clock (the default, both `i64::MIN`, before any commit).
    pub fn clock(&self) -> Result<Clock, StoreError> {
        Ok(self.meta(META_CLOCK)?.map(|b| decode_clock(&b)).transpose()?.unwrap_or_default())
    }

    /// Stages the clock to be committed with the next batch.
    pub fn stage_clock(&mut self, clock: &Clock) {
        self.stage_meta(META_CLOCK, encode_clock(clock));
    }

    /// The committed path statistics (empty ones of `markov_order` before
    /// any, without a channel cap); an error when they were collected with
    /// another Markov order. Statistics an earlier build stored as one
    /// record (`m` `stats`) are converted to counters: the counters and the
    /// removal of the record are staged for the next commit.
    pub fn stats(&mut self, markov_order: usize) -> Result<PathStats, StoreError> {
        if let Some(b) = self.meta(META_STATS)? {
            let mut stats = decode_stats(&b, markov_order)?;
            let delta = stats.take_delta();
            stats_keys::stage_delta(&self.tree, &stats, &delta, &mut self.staged)?;
            self.staged.remove(meta_key(META_STATS));
            return Ok(stats);
        }
        Ok(stats_keys::load(&self.tree, markov_order)?.unwrap_or_else(|| PathStats::new(markov_order)))
    }

    /// Stages the counters of `stats` changed since its last delta (see
    /// [`PathStats::track_changes`]; untracked statistics are written
    /// whole) to be committed with the next batch. Nothing when none changed.
    pub fn stage_stats(&mut self, stats: &mut PathStats) -> Result<(), StoreError> {
        let delta = stats.take_delta();
        stats_keys::stage_delta(&self.tree, stats, &delta, &mut self.staged)
    }

    /// Stages the removal of the stored path statistics (counters, and the
    /// record of earlier builds), e.g. when no model needs them any more.
    /// Returns true when there were some.
    pub fn stage_drop_stats(&mut self) -> Result<bool, StoreError> {
        let mut n = stats_keys::stage_drop(&self.tree, &mut self.staged)?;
        if self.meta(META_STATS)?.is_some() {
            self.staged.remove(meta_key(META_STATS));
            n += 1;
        }
        Ok(n > 0)
    }

    /// The model snapshot the partition credits with (its `model_version`),
    /// if one was committed.
    pub fn active_snapshot(&self) -> Result<Option<String>, StoreError> {
        self.meta(META_SNAPSHOT)?
            .map(|b| {
                String::from_utf8(b.to_vec())
                    .map_err(|_| StoreError::Corrupt { prefix: 'm', detail: "snapshot name is not UTF-8".into() })
            })
            .transpose()
    }

    /// Stages the active snapshot to be committed with the next batch.
    pub fn stage_active_snapshot(&mut self, version: &str) {
        self.stage_meta(META_SNAPSHOT, version.as_bytes().to_vec());
    }

    /// The committed source position (opaque to the store: e.g. the
    /// identity of a followed file), if any.
    pub fn source_position(&self) -> Result<Option<Vec<u8>>, StoreError> {
        Ok(self.meta(META_SOURCE)?.map(|b| b.to_vec()))
    }

    /// Stages the source position to be committed with the next batch.
    pub fn stage_source_position(&mut self, bytes: Vec<u8>) {
        self.stage_meta(META_SOURCE, bytes);
    }

    /// Every recorded decision, in offset order.
    pub fn decisions(&self) -> Result<Vec<Decision>, StoreError> {
        let mut out = Vec::new();
        for item in self.tree.scan_prefix([D]) {
            let (k, v) = item?;
            out.push(Decision::decode(&k, &v)?);
        }
        Ok(out)
    }

    /// Records decisions at once (before the output that depends on them is
    /// written anywhere), durably when `flush` (not needed when a changelog
    /// takes them before that output: after a crash the partition is
    /// restored from it); returns the writes (for a changelog).
    pub fn record_decisions(&mut self, decisions: &[Decision], flush: bool) -> Result<ChangeSet, StoreError> {
        let mut changes = ChangeSet::default();
        if decisions.is_empty() {
            return Ok(changes);
        }
        for d in decisions {
            changes.set(d.key(), d.value());
        }
        changes.apply(&self.tree)?;
        if flush {
            self.db.flush()?;
        }
        Ok(changes)
    }

    /// Stages the removal of decisions at or before `offset` (their effect
    /// is in the state committed with that offset).
    pub fn stage_forget_decisions(&mut self, offset: i64) -> Result<(), StoreError> {
        let mut end = vec![D];
        end.extend_from_slice(&ordered_i64(offset));
        end.push(0xff);
        for item in self.tree.range(vec![D]..end) {
            let (k, _) = item?;
            self.staged.remove(k);
        }
        Ok(())
    }

    /// Adds the writes that persist `key`'s cached state to `out`, and
    /// marks the entry clean. Returns the change in persisted journeys.
    fn persist_into(&mut self, key: &UserKey, out: &mut ChangeSet) -> i64 {
        let Some(c) = self.cache.get_mut(key) else { return 0 };
        if !c.dirty {
            return 0;
        }
        let mut delta = 0;
        match &c.journey {
            Some(held) => {
                out.set(jkey(key), &held.record(c.wake)[..]);
                if !c.persisted_exists {
                    delta += 1;
                }
            }
            None => {
                out.remove(jkey(key));
                if c.persisted_exists {
                    delta -= 1;
                }
            }
        }
        c.dirty = false;
        c.persisted_exists = c.journey.is_some();
        delta
    }

    fn remove_entry(&mut self, key: &UserKey) {
        if let Some(c) = self.cache.remove(key) {
            self.bytes -= c.bytes();
        }
    }

    /// Writes every change since the last commit in one atomic batch (with
    /// `durable`, also waits until sled has it on disk) and returns it: the
    /// journeys changed since the last commit (new records, each carrying
    /// its wake time, or tombstones of closed ones), the event ids seen, and what
    /// was staged (offsets, clock, statistics, snapshot, source position,
    /// forgotten decisions and seen records). Applied in order to a copy of
    /// this partition's state as of the last commit, it gives the same state
    /// (decisions, which `record_decisions` writes before a commit, and the
    /// overflow `spill_if_over_budget` writes in replay mode are not in it).
    pub fn commit(&mut self, durable: bool) -> Result<ChangeSet, StoreError> {
        let prepared = self.prepare();
        self.apply(prepared, durable)
    }

    /// The first half of [`PartitionStore::commit`]: collects every change
    /// since the last commit (encoding the changed journeys) and marks the
    /// cache clean, without writing anything. Until [`PartitionStore::apply`]
    /// writes it, every journey it holds stays in the cache (reads never ask
    /// sled for them), so events may be applied meanwhile; their changes go
    /// to the next commit. Apply prepared commits in the order prepared.
    pub fn prepare(&mut self) -> Prepared {
        let mut changes = ChangeSet::default();
        let mut dirty: Vec<UserKey> = self.cache.iter().filter(|(_, c)| c.dirty).map(|(k, _)| *k).collect();
        // In key order: the same changes give the same set.
        dirty.sort_unstable();
        let mut delta = 0;
        for key in &dirty {
            delta += self.persist_into(key, &mut changes);
        }
        self.seen.persist_into(&mut changes);
        changes.extend(std::mem::take(&mut self.staged));
        self.unapplied.extend(dirty.iter().copied());
        Prepared { changes, written: dirty, delta, tree: self.tree.clone(), done: false, changelog_offset: None }
    }

    /// The second half of [`PartitionStore::commit`]: writes a prepared
    /// commit in one atomic batch (with `durable`, also waits until sled
    /// has it on disk), then lets the cache drop what is now in sled:
    /// closed journeys it wrote that nothing changed since, and the least
    /// recently used clean entries when over budget.
    pub fn apply(&mut self, mut prepared: Prepared, durable: bool) -> Result<ChangeSet, StoreError> {
        prepared.write()?;
        if durable {
            self.db.flush()?;
        }
        self.applied(prepared)
    }

    /// The bookkeeping of [`PartitionStore::apply`] once the prepared commit
    /// is written ([`Prepared::write`], e.g. on another thread, and flushed
    /// if it must be durable). An error if it was not written.
    pub fn applied(&mut self, prepared: Prepared) -> Result<ChangeSet, StoreError> {
        let Prepared { changes, written, delta, done, .. } = prepared;
        if !done {
            return Err(StoreError::Unwritten);
        }
        self.open_journeys = (self.open_journeys as i64 + delta).max(0) as u64;
        self.unapplied.clear();
        for key in &written {
            if self.cache.get(key).is_some_and(|c| c.journey.is_none() && !c.dirty) {
                self.remove_entry(key);
            }
        }
        if self.bytes > self.budget {
            // Only clean entries (their state is in sled now): evicting
            // them only drops memory. Changes made since the prepare stay.
            self.evict_lru(usize::MAX, true)?;
        }
        Ok(changes)
    }

    /// Frees memory until a quarter of the budget is free: encodes the least
    /// recently used decoded journeys in memory, then, if that is not
    /// enough, evicts least recently used entries, writing those with
    /// uncommitted changes to sled first (in batches of `chunk` entries; not
    /// atomic as a whole).
    fn evict_lru(&mut self, chunk: usize, clean_only: bool) -> Result<(), StoreError> {
        let target = self.budget - self.budget / 4;
        let mut order: Vec<(u64, UserKey)> = self.cache.iter().map(|(k, c)| (c.last_used, *k)).collect();
        order.sort_unstable();
        // First, encode decoded journeys in memory, least recently used
        // first (about half the size, nothing written to sled).
        for (_, key) in &order {
            if self.bytes <= target {
                return Ok(());
            }
            let c = self.cache.get_mut(key).expect("listed above");
            if let Some(held @ Held::Decoded(_)) = &c.journey {
                let held = Held::Encoded(held.record(c.wake).into_owned().into_boxed_slice());
                let size = held.size();
                self.bytes = self.bytes - c.size + size;
                c.size = size;
                c.journey = Some(held);
            }
        }
        if self.bytes <= self.budget {
            // Everything is encoded and fits: nothing needs to leave memory.
            return Ok(());
        }
        let mut victims = Vec::new();
        let mut left = self.bytes;
        for (_, key) in order {
            if left <= target {
                break;
            }
            if clean_only && self.cache[&key].dirty {
                continue;
            }
            left -= self.cache[&key].bytes();
            victims.push(key);
        }
        for part in victims.chunks(chunk.max(1)) {
            let mut spill = ChangeSet::default();
            let dirty: Vec<&UserKey> = part.iter().filter(|k| self.cache[*k].dirty).collect();
            if !dirty.is_empty() {
                let delta: i64 = dirty.iter().map(|k| self.persist_into(k, &mut spill)).sum();
                spill.apply(&self.tree)?;
                self.open_journeys = (self.open_journeys as i64 + delta).max(0) as u64;
                self.spilled += dirty.len() as u64;
            }
            for key in part {
                self.remove_entry(key);
            }
        }
        Ok(())
    }

    /// Replay mode (no durability between events, see
    /// [`PartitionStore::spill_if_over_budget`]): the store itself spills
    /// from `save` when it outgrows its budget.
    pub fn with_auto_spill(mut self) -> Self {
        self.auto_spill = true;
        self
    }

    /// For `replay`, which needs no durability between events: journeys stay
    /// in memory while they fit the byte budget; above it, the least
    /// recently used ones are encoded in memory, and if that is not enough,
    /// written to sled and evicted. Returns true if it was over budget.
    pub fn spill_if_over_budget(&mut self) -> Result<bool, StoreError> {
        if self.bytes > self.budget {
            // Smaller sled batches keep sled's own memory small.
            self.evict_lru(10_000, false)?;
            return Ok(true);
        }
        Ok(false)
    }
}

/// Removes the wake index keys that earlier builds wrote (`w` + wake time +
/// user key); the index is rebuilt in memory from the journey records.
fn drop_wake_keys(tree: &sled::Tree) -> Result<(), StoreError> {
    let mut batch = ChangeSet::default();
    for item in tree.scan_prefix([W]) {
        batch.remove(item?.0);
    }
    if !batch.is_empty() {
        batch.apply(tree)?;
    }
    Ok(())
}

/// Moves the per-event duplicate-detection keys that earlier builds wrote
/// (`e` + digest -> event time, `f` + event time + digest) into one
/// [`Seen`] record, in one atomic batch. Each id is remembered as of its
/// event time, as those stores pruned them.
fn migrate_seen_keys(tree: &sled::Tree) -> Result<(), StoreError> {
    if tree.scan_prefix([E]).next().is_none() && tree.scan_prefix([F]).next().is_none() {
        return Ok(());
    }
    let mut seen = Seen::load(tree)?;
    let mut batch = ChangeSet::default();
    for item in tree.scan_prefix([E]) {
        let (k, v) = item?;
        let digest = u128::from_be_bytes(
            k[1..]
                .try_into()
                .map_err(|_| StoreError::Corrupt { prefix: 'e', detail: "digest is not 16 bytes".into() })?,
        );
        let ts = from_ordered_i64(
            v.as_ref()
                .get(..8)
                .ok_or_else(|| StoreError::Corrupt { prefix: 'e', detail: "event time is not 8 bytes".into() })?,
        );
        seen.check_and_mark(digest, ts, i64::MIN);
        batch.remove(k);
    }
    for item in tree.scan_prefix([F]) {
        batch.remove(item?.0);
    }
    seen.persist_into(&mut batch);
    batch.apply(tree)?;
    Ok(())
}

impl PartitionStore {
    /// True when some journey has something to do at `watermark` (what
    /// [`JourneyStore::due`] would return is not empty).
    pub fn has_due(&self, watermark: i64) -> Result<bool, StoreError> {
        Ok(self.wakes.first().is_some_and(|(w, _)| *w <= watermark))
    }
}

impl JourneyStore for PartitionStore {
    type Error = StoreError;

    fn load(&mut self, key: &UserKey) -> Result<Option<Journey>, StoreError> {
        self.entry(key)?.journey.clone().map(Held::into_journey).transpose()
    }

    fn take(&mut self, key: &UserKey) -> Result<Option<Journey>, StoreError> {
        // The entry keeps its wake and size until `save` puts the journey back.
        self.entry(key)?.journey.take().map(Held::into_journey).transpose()
    }

    fn save(&mut self, key: &UserKey, journey: Journey, wake: Option<i64>) -> Result<(), StoreError> {
        let (old_wake, persisted_exists) = {
            let c = self.entry(key)?;
            (c.wake, c.persisted_exists)
        };
        if let Some(w) = old_wake {
            self.wakes.remove(&(w, *key));
        }
        // Nothing to write: no journey, and none committed to delete.
        let nothing_to_write = journey.is_empty() && !persisted_exists;
        // While a prepared commit that deletes the user's record is not yet
        // applied, sled still holds that record: the (empty) entry stays so
        // that no read finds it. Otherwise the user is forgotten right away.
        if nothing_to_write && !self.unapplied.contains(key) {
            self.remove_entry(key);
            return Ok(());
        }
        let present = !journey.is_empty();
        let wake = if present { wake } else { None };
        if let Some(w) = wake {
            self.wakes.insert((w, *key));
        }
        let held = present.then_some(Held::Decoded(journey));
        let size = held.as_ref().map_or(0, Held::size);
        let c = self.cache.get_mut(key).expect("entry loaded");
        let old_bytes = c.bytes();
        c.journey = held;
        c.size = size;
        c.wake = wake;
        c.dirty = !nothing_to_write;
        let new_bytes = c.bytes();
        self.bytes = self.bytes + new_bytes - old_bytes;
        self.saves += 1;
        if self.auto_spill && self.saves % AUTO_SPILL_EVERY == 0 {
            self.spill_if_over_budget()?;
        }
        Ok(())
    }

    fn due(&mut self, watermark: i64) -> Result<Vec<UserKey>, StoreError> {
        // One wake per key, in (wake, key) order.
        Ok(self.wakes.range(..=(watermark, UserKey([0xff; 32]))).map(|(_, k)| *k).collect())
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

#[cfg(test)]
mod tests {
    use super::*;

    /// A store that earlier builds wrote keeps its duplicate detection: the
    /// per-event `e`/`f` keys become one seen record on open, atomically.
    #[test]
    fn per_event_seen_keys_of_earlier_builds_are_migrated() {
        let db = sled::Config::new().temporary(true).open().unwrap();
        let tree = db.open_tree("p/x").unwrap();
        for (digest, ts) in [(7u128, 1_000i64), (9, 2_000)] {
            let mut e = vec![E];
            e.extend_from_slice(&digest.to_be_bytes());
            tree.insert(e, &ordered_i64(ts)[..]).unwrap();
            let mut f = vec![F];
            f.extend_from_slice(&ordered_i64(ts));
            f.extend_from_slice(&digest.to_be_bytes());
            tree.insert(f, &[][..]).unwrap();
        }
        // And a wake index key (wake 5 for a user without a record): dropped,
        // the index is rebuilt from the journey records.
        let mut w = vec![W];
        w.extend_from_slice(&ordered_i64(5));
        w.extend_from_slice(&[3; 32]);
        tree.insert(w, &[][..]).unwrap();
        let mut p = PartitionStore::new(tree.clone(), db.clone(), 1 << 20).unwrap();
        assert_eq!(tree.scan_prefix([E]).count() + tree.scan_prefix([F]).count(), 0);
        assert_eq!(tree.scan_prefix([W]).count(), 0);
        assert!(!p.has_due(i64::MAX).unwrap());
        assert_eq!(tree.scan_prefix([crate::seen::S]).count(), 1);
        assert_eq!(p.remembered_ids(), 2);
        // Remembered as of their event times, as the old store pruned them.
        assert!(!p.mark_seen(7, 5_000, 1_000));
        assert!(p.mark_seen(7, 5_000, 1_001));
        assert!(!p.mark_seen(9, 5_000, 2_000));
        // Opening again finds nothing left to migrate and the same ids.
        let p = PartitionStore::new(tree.clone(), db, 1 << 20).unwrap();
        assert_eq!(p.remembered_ids(), 2);
    }

    /// The path statistics of a store written by an earlier build (one
    /// JSON record under `m` `stats`, format 1) load, and the next commit
    /// replaces the record by counters, in the same batch.
    #[test]
    fn a_statistics_record_of_earlier_builds_is_converted_to_counters() {
        let db = sled::Config::new().temporary(true).open().unwrap();
        let tree = db.open_tree("p/x").unwrap();
        // The bytes an earlier build wrote (derived by hand from the serde
        // form documented in the engine's stats.rs): version 1, then JSON
        // of the paths [email, seo] (converted) and [seo] (not), order 1.
        let old = br#"{"markov_order":1,"paths":2,"conversions":1,"channel_sets":[{"channels":["email","seo"],"conversions":1,"non_conversions":0},{"channels":["seo"],"conversions":0,"non_conversions":1}],"transitions":[{"from":"start","to":{"state":["email"]},"count":1},{"from":"start","to":{"state":["seo"]},"count":1},{"from":{"state":["email"]},"to":{"state":["seo"]},"count":1},{"from":{"state":["seo"]},"to":"conversion","count":1},{"from":{"state":["seo"]},"to":"null","count":1}]}"#;
        let mut record = vec![1u8];
        record.extend_from_slice(old);
        tree.insert(meta_key(META_STATS), record).unwrap();
        let mut want = PathStats::new(1);
        want.add_path(&["email", "seo"], true);
        want.add_path(&["seo"], false);

        let mut p = PartitionStore::new(tree.clone(), db.clone(), 1 << 20).unwrap();
        assert_eq!(p.stats(1).unwrap(), want);
        assert!(tree.get(meta_key(META_STATS)).unwrap().is_some(), "converted at the commit, not before");
        p.commit(true).unwrap();
        assert!(tree.get(meta_key(META_STATS)).unwrap().is_none());
        // 2 sets + 5 transitions + the header.
        assert_eq!(tree.scan_prefix([stats_keys::P]).count(), 8);
        let mut p = PartitionStore::new(tree.clone(), db.clone(), 1 << 20).unwrap();
        assert_eq!(p.stats(1).unwrap(), want);
        assert!(matches!(p.stats(2), Err(StoreError::MarkovOrder { stored: 1, configured: 2 })));
        // Dropped (no data-driven model any more): nothing is left.
        assert!(p.stage_drop_stats().unwrap());
        p.commit(true).unwrap();
        assert_eq!(tree.scan_prefix([stats_keys::P]).count(), 0);
        assert_eq!(p.stats(1).unwrap(), PathStats::new(1));
        assert!(!p.stage_drop_stats().unwrap());
    }

    /// A commit after a batch that changed one path's counters writes those
    /// counters and the header only, not the whole statistics.
    #[test]
    fn a_commit_writes_only_the_changed_counters() {
        let db = sled::Config::new().temporary(true).open().unwrap();
        let tree = db.open_tree("p/x").unwrap();
        let mut p = PartitionStore::new(tree, db, 1 << 20).unwrap();
        let mut stats = PathStats::new(1);
        stats.track_changes();
        for c in ["a", "b", "c", "d", "e", "f"] {
            stats.add_path(&[c], true);
        }
        p.stage_stats(&mut stats).unwrap();
        // 6 sets + 12 transitions + header (derived by hand: START -> c and c -> CONV per path).
        assert_eq!(p.commit(false).unwrap().len(), 19);
        stats.add_path(&["a", "b"], false);
        p.stage_stats(&mut stats).unwrap();
        // Set {a, b}; START -> a, a -> b, b -> NULL; header.
        assert_eq!(p.commit(false).unwrap().len(), 5);
        p.stage_stats(&mut stats).unwrap();
        assert!(p.commit(false).unwrap().is_empty());
    }

    fn arb_paths() -> impl proptest::strategy::Strategy<Value = Vec<(Vec<&'static str>, bool, u8)>> {
        use proptest::prelude::*;
        const NAMES: [&str; 8] = ["seo", "email", "social", "display", "direct", "affiliate", "video", "audio"];
        proptest::collection::vec((proptest::collection::vec(0usize..8, 1..5), any::<bool>(), 0u8..4), 1..40).prop_map(
            |v| v.into_iter().map(|(p, c, cut)| (p.into_iter().map(|i| NAMES[i]).collect(), c, cut)).collect(),
        )
    }

    proptest::proptest! {
        /// Statistics written as deltas over any commit boundaries (and
        /// reopened from the store at some of them) load equal to the
        /// statistics built in one pass, with or without a channel cap.
        #[test]
        fn statistics_loaded_from_deltas_equal_one_pass(
            paths in arb_paths(),
            order in 1usize..=3,
            cap in proptest::option::of(1usize..6),
        ) {
            let db = sled::Config::new().temporary(true).open().unwrap();
            let tree = db.open_tree("p/x").unwrap();
            let open = || {
                let mut p = PartitionStore::new(tree.clone(), db.clone(), 1 << 20).unwrap();
                let mut s = p.stats(order).unwrap();
                s.track_changes();
                (p, s.with_max_channels(cap))
            };
            let (mut p, mut s) = open();
            let mut one_pass = PathStats::new(order).with_max_channels(cap);
            for (path, converted, cut) in &paths {
                s.add_path(path, *converted);
                one_pass.add_path(path, *converted);
                // cut: 0 no commit, 1 commit, 2 commit and reopen, 3 reopen
                // without a commit (the batch is lost, as after a crash).
                match cut {
                    0 => {}
                    1 | 2 => {
                        p.stage_stats(&mut s).unwrap();
                        p.commit(false).unwrap();
                    }
                    _ => {}
                }
                if *cut >= 2 {
                    let committed = open();
                    p = committed.0;
                    s = committed.1;
                    // What was lost is counted again, as a redelivery does.
                    if *cut == 3 {
                        one_pass = PathStats::new(order).with_max_channels(cap);
                        one_pass.merge(&s);
                    }
                }
            }
            p.stage_stats(&mut s).unwrap();
            p.commit(false).unwrap();
            let (_, loaded) = open();
            proptest::prop_assert_eq!(&loaded, &one_pass);
            proptest::prop_assert_eq!(loaded.fingerprint(), one_pass.fingerprint());
        }
    }

    #[derive(Debug, Clone)]
    enum Op {
        Save { user: u8, touches: u8, wake: Option<i64> },
        Seen { digest: u8, as_of: i64 },
        Prune { before: i64 },
        Offset(i64),
        Commit,
    }

    fn op() -> impl proptest::strategy::Strategy<Value = Op> {
        use proptest::prelude::*;
        prop_oneof![
            4 => (0u8..12, 0u8..4, proptest::option::of(0i64..50))
                .prop_map(|(user, touches, wake)| Op::Save { user, touches, wake }),
            3 => (any::<u8>(), 0i64..100).prop_map(|(digest, as_of)| Op::Seen { digest, as_of }),
            1 => (0i64..100).prop_map(|before| Op::Prune { before }),
            1 => (0i64..1000).prop_map(Op::Offset),
            2 => Just(Op::Commit),
        ]
    }

    fn journey(user: u8, touches: u8) -> Journey {
        Journey {
            touches: (0..touches)
                .map(|i| apportion_engine::Touch {
                    event_id: format!("e-{user}-{i}"),
                    ts: i64::from(i),
                    seq: u64::from(i),
                    channel: "email".into(),
                    campaign: None,
                    interaction: apportion_engine::Interaction::Click,
                })
                .collect(),
            pending: Vec::new(),
        }
    }

    fn contents(tree: &sled::Tree) -> Vec<(Vec<u8>, Vec<u8>)> {
        tree.iter().map(|r| r.unwrap()).map(|(k, v)| (k.to_vec(), v.to_vec())).collect()
    }

    proptest::proptest! {
        /// The change sets that commits return, applied in order to an
        /// empty tree, rebuild the partition's committed state exactly (what
        /// a changelog restore relies on), whatever the operations, the
        /// cache budget (evictions of clean entries) and the commit points.
        #[test]
        fn change_sets_rebuild_the_committed_state(
            ops in proptest::collection::vec(op(), 1..120),
            small_budget in proptest::bool::ANY,
        ) {
            let db = sled::Config::new().temporary(true).open().unwrap();
            let tree = db.open_tree("p/x").unwrap();
            let mirror = db.open_tree("mirror").unwrap();
            let budget = if small_budget { 1_500 } else { 1 << 20 };
            let mut p = PartitionStore::new(tree.clone(), db.clone(), budget).unwrap();
            for op in ops.iter().cloned().chain([Op::Commit]) {
                match op {
                    Op::Save { user, touches, wake } => {
                        let key = UserKey([user; 32]);
                        p.save(&key, journey(user, touches), wake).unwrap();
                    }
                    Op::Seen { digest, as_of } => {
                        p.mark_seen(u128::from(digest), as_of, as_of - 30);
                    }
                    Op::Prune { before } => {
                        p.prune_seen(before).unwrap();
                    }
                    Op::Offset(o) => p.stage_offset("events/0", o),
                    Op::Commit => {
                        let changes = p.commit(false).unwrap();
                        changes.apply(&mirror).unwrap();
                    }
                }
            }
            proptest::prop_assert_eq!(contents(&mirror), contents(&tree));
            // The wake index rebuilt from the records equals the live one.
            let mut restored = PartitionStore::new(mirror, db.clone(), budget).unwrap();
            for w in [10, 25, 50] {
                proptest::prop_assert_eq!(restored.due(w).unwrap(), p.due(w).unwrap());
            }
        }
    }

    proptest::proptest! {
        /// A commit prepared, then applied after more operations (as the
        /// service does while the sinks write a batch), gives the same
        /// reads at every step, the same change sets in the same order and
        /// the same stored state as committing at the prepare point: a
        /// journey closed or changed in a prepared commit is never read
        /// back stale from sled, and changes made after the prepare are
        /// neither evicted nor written before the next commit.
        #[test]
        fn a_commit_applied_later_equals_one_applied_at_once(
            steps in proptest::collection::vec(step(), 1..150),
            small_budget in proptest::bool::ANY,
        ) {
            let db = sled::Config::new().temporary(true).open().unwrap();
            let budget = if small_budget { 1_500 } else { 1 << 20 };
            let mut at_once = PartitionStore::new(db.open_tree("p/a").unwrap(), db.clone(), budget).unwrap();
            let mut later = PartitionStore::new(db.open_tree("p/b").unwrap(), db.clone(), budget).unwrap();
            let (mut sets_at_once, mut sets_later) = (Vec::new(), Vec::new());
            let mut pending: Option<Prepared> = None;
            for step in steps {
                match step {
                    Step::Save { user, touches, wake } => {
                        let key = UserKey([user; 32]);
                        proptest::prop_assert_eq!(later.load(&key).unwrap(), at_once.load(&key).unwrap());
                        at_once.save(&key, journey(user, touches), wake).unwrap();
                        later.save(&key, journey(user, touches), wake).unwrap();
                    }
                    Step::Close { user } => {
                        // As the engine closes one: taken, saved back empty.
                        let key = UserKey([user; 32]);
                        proptest::prop_assert_eq!(later.take(&key).unwrap(), at_once.take(&key).unwrap());
                        at_once.save(&key, Journey::default(), None).unwrap();
                        later.save(&key, Journey::default(), None).unwrap();
                    }
                    Step::ApplyEarly => {
                        if let Some(p) = pending.take() {
                            sets_later.push(later.apply(p, false).unwrap());
                        }
                    }
                    Step::Offset(o) => {
                        at_once.stage_offset("events/0", o);
                        later.stage_offset("events/0", o);
                    }
                    Step::Commit => {
                        sets_at_once.push(at_once.commit(false).unwrap());
                        if let Some(p) = pending.take() {
                            sets_later.push(later.apply(p, false).unwrap());
                        }
                        pending = Some(later.prepare());
                    }
                }
            }
            if let Some(p) = pending.take() {
                sets_later.push(later.apply(p, false).unwrap());
            }
            sets_at_once.push(at_once.commit(false).unwrap());
            sets_later.push(later.commit(false).unwrap());
            proptest::prop_assert_eq!(sets_later, sets_at_once);
            proptest::prop_assert_eq!(contents(&db.open_tree("p/b").unwrap()), contents(&db.open_tree("p/a").unwrap()));
            proptest::prop_assert_eq!(later.open_journeys(), at_once.open_journeys());
        }
    }

    #[derive(Debug, Clone)]
    enum Step {
        Save {
            user: u8,
            touches: u8,
            wake: Option<i64>,
        },
        /// Close the user's journey.
        Close {
            user: u8,
        },
        /// Apply the prepared commit before the next prepare.
        ApplyEarly,
        Offset(i64),
        /// Commit `at_once`; apply `later`'s prepared commit and prepare the next.
        Commit,
    }

    fn step() -> impl proptest::strategy::Strategy<Value = Step> {
        use proptest::prelude::*;
        prop_oneof![
            5 => (0u8..12, 1u8..4, proptest::option::of(0i64..50))
                .prop_map(|(user, touches, wake)| Step::Save { user, touches, wake }),
            2 => (0u8..12).prop_map(|user| Step::Close { user }),
            1 => Just(Step::ApplyEarly),
            1 => (0i64..1000).prop_map(Step::Offset),
            2 => Just(Step::Commit),
        ]
    }
}
