//! # apportion-store
//!
//! The sled-backed state of apportion. One sled tree per input partition
//! holds everything that partition's processing needs, under one-byte key
//! prefixes, so that one `sled::Batch` makes a whole input batch durable
//! atomically (state, indexes and input offsets together), and so that a
//! partition's state can later be shipped as a changelog of keyed records:
//!
//! | prefix | key | value |
//! | --- | --- | --- |
//! | `j` | user key (32 bytes) | versioned journey record |
//! | `s` | largest "as of" time (8 bytes, order-preserving) + sequence (8 bytes) | event-id digests remembered for duplicate detection, one record per commit (format in `seen.rs`) |
//! | `o` | source name | input offset (8 bytes) |
//! | `m` | `clock` / `snapshot` / `source` | the partition's clock, active model snapshot and source position (formats in `codec.rs`) |
//! | `d` | offset + kind (`f` future-dated, `a` idle advance, `w` output mark) | decisions that depended on processing time or on where a batch ended (`codec::Decision`) |
//! | `p` | `h` / `s` + channel set / `t` + transition | the partition's path statistics as keyed counters, format version 2 ([`STATS_COUNTERS_VERSION`]; layout below) |
//!
//! Path statistics (`p`), written per change: a commit writes only the
//! counters its batch changed, each with its current value, plus the
//! header, in the commit's batch.
//!
//! | key | value |
//! | --- | --- |
//! | `p` `h` | header: format version (1 byte, 2), Markov order (1 byte), paths (8 bytes BE), converting paths (8 bytes BE) |
//! | `p` `s` + channel list | converting paths (8 bytes BE), non-converting paths (8 bytes BE) whose set of distinct channels is exactly the list |
//! | `p` `t` + node + node | count of the Markov transition from the first node to the second (8 bytes BE) |
//!
//! A channel list is its length (4 bytes BE), then each name as its length
//! (2 bytes BE) and UTF-8 bytes: a set's names sorted byte-wise, a state's
//! in path order. A node is a tag byte: `0` START, `1` a state followed by
//! its channel list, `2` CONVERSION, `3` NULL. Keys name channels (never
//! interned ids), so loading does not depend on counting order. The
//! channel-cap overflow bucket is the channel `"\0overflow"`. Format
//! version 1 was one JSON record under `m` `stats`, rewritten whole at every
//! commit; it is converted to counters the first time it is read (staged
//! with the next commit, which deletes the record).
//!
//! Why a write-back cache: one sled write per event is far slower than the
//! engine (it costs more than all the rest of the work an event needs). [`PartitionStore`] keeps recently
//! used journeys in memory, coalesces every change of a batch into one write
//! per user, and evicts clean entries when its byte budget is exceeded.
//!
//! Why a wake index rather than an expiry scan: every journey is stored with
//! the earliest watermark at which it has something to do (a conversion to
//! credit or a run of touches to expire). The index of those wake times is
//! held in memory (about 64 bytes per open journey), rebuilt from the journey
//! records when a partition opens, so `due(watermark)` reads only the index
//! range up to the watermark, never all users, and a changed wake costs no
//! sled write of its own. Stores from earlier builds also held the index as
//! `w` keys, and per-event `e`/`f` keys for duplicate detection; they are
//! migrated when a partition opens.
#![deny(missing_docs)]
#![forbid(unsafe_code)]

mod changelog;
mod changes;
mod codec;
mod partition;
mod seen;
mod stats_keys;

pub use changelog::{Restore, Restored, COMMIT_MARKER};
pub use changes::ChangeSet;
pub use codec::{
    decode_clock, decode_journey, decode_offset, decode_stats, encode_clock, encode_journey, encode_stats, Clock,
    Decision, StoredJourney, JOURNEY_FORMAT_VERSION,
};
pub use partition::{PartitionStore, Prepared};
pub use stats_keys::STATS_COUNTERS_VERSION;

use std::path::{Path, PathBuf};

/// Errors of the store.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum StoreError {
    /// sled failed.
    #[error("state store: {0}")]
    Sled(#[from] sled::Error),
    /// A prepared commit was finished before it was written (a bug in the
    /// caller; nothing is changed).
    #[error("state store: a prepared commit was finished before it was written")]
    Unwritten,
    /// A stored record could not be decoded.
    #[error("state store: corrupt record under key prefix {prefix:?}: {detail}")]
    Corrupt {
        /// Key prefix of the record.
        prefix: char,
        /// What went wrong.
        detail: String,
    },
    /// A stored record has a format version this build does not know.
    #[error("state store: record format version {found} is not supported by this build (expected {expected}); was the data dir written by a newer apportion?")]
    UnknownVersion {
        /// Version found.
        found: u8,
        /// Version expected.
        expected: u8,
    },
    /// Stored path statistics were collected for another `markov_order`.
    #[error("state store: the stored path statistics are for markov_order = {stored}, the configuration says {configured}; set markov_order back to {stored}, or start with an empty data_dir and replay the input to rebuild them")]
    MarkovOrder {
        /// Order of the stored statistics.
        stored: usize,
        /// Order configured.
        configured: usize,
    },
    /// The store was written with another pseudonymization key.
    #[error("state store: this data_dir was written with another pseudonymization key (key fingerprint {stored}..., the configured key's is {configured}...); user keys made with the two keys never match, so continuing would split every user in two. Start with the key the store was written with, or re-key: replay the input with the new key into a new data_dir (README, \"Key rotation\")")]
    KeyMismatch {
        /// First 16 hex digits of the stored fingerprint.
        stored: String,
        /// First 16 hex digits of the configured key's fingerprint.
        configured: String,
    },
    /// The data directory could not be used.
    #[error("state store: cannot open {path}: {detail}")]
    Open {
        /// Data directory.
        path: PathBuf,
        /// Cause.
        detail: String,
    },
}

/// Key of the pseudonymization key's fingerprint in the default tree.
const KEY_FINGERPRINT: &[u8] = b"key_fingerprint";
/// The name this store's instance gives itself (made once, kept).
const INSTANCE_NAME: &[u8] = b"instance_name";

/// What [`Store::check_key_fingerprint`] found.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum KeyCheck {
    /// The store was written with the same key.
    Matches,
    /// A new store: the fingerprint is recorded.
    Recorded,
    /// A store with state but no fingerprint (written by an earlier build):
    /// the fingerprint is recorded now, unverified.
    Adopted,
}

/// How long [`Store::open`] waits for another handle to release the
/// directory lock.
const LOCK_WAIT: std::time::Duration = std::time::Duration::from_secs(2);

/// Whether sled failed to take the directory lock (it wraps the OS error
/// `WouldBlock` in a message of its own).
fn is_lock_error(e: &sled::Error) -> bool {
    match e {
        sled::Error::Io(io) => {
            io.kind() == std::io::ErrorKind::WouldBlock || io.to_string().contains("could not acquire lock")
        }
        _ => false,
    }
}

/// The whole store: one sled database, one tree per input partition.
#[derive(Clone)]
pub struct Store {
    db: sled::Db,
}

impl Store {
    /// Opens (or creates) the store in `dir`.
    pub fn open(dir: &Path) -> Result<Store, StoreError> {
        std::fs::create_dir_all(dir)
            .map_err(|e| StoreError::Open { path: dir.to_path_buf(), detail: e.to_string() })?;
        // sled holds an advisory lock on the directory until its flusher
        // thread has exited, which can be a moment after the last handle was
        // dropped (a restart in the same process, or a predecessor process
        // still exiting). Wait a bounded time for it before giving up.
        let deadline = std::time::Instant::now() + LOCK_WAIT;
        loop {
            let opened = sled::Config::new().path(dir).cache_capacity(64 << 20).mode(sled::Mode::HighThroughput).open();
            match opened {
                Ok(db) => return Ok(Store { db }),
                Err(e) if is_lock_error(&e) && std::time::Instant::now() < deadline => {
                    std::thread::sleep(std::time::Duration::from_millis(20));
                }
                Err(e) => {
                    let detail = if is_lock_error(&e) {
                        format!(
                            "{e} (another process, or another store handle in this one, still has it open after {}s)",
                            LOCK_WAIT.as_secs()
                        )
                    } else {
                        e.to_string()
                    };
                    return Err(StoreError::Open { path: dir.to_path_buf(), detail });
                }
            }
        }
    }

    /// A store in a temporary location, removed when dropped.
    pub fn temporary() -> Result<Store, StoreError> {
        let db = sled::Config::new().temporary(true).cache_capacity(64 << 20).open()?;
        Ok(Store { db })
    }

    /// The state of one input partition (e.g. `events/3`), with a cache
    /// budget in bytes.
    pub fn partition(&self, name: &str, cache_budget_bytes: usize) -> Result<PartitionStore, StoreError> {
        let tree = self.db.open_tree(format!("p/{name}"))?;
        PartitionStore::new(tree, self.db.clone(), cache_budget_bytes)
    }

    /// Checks the fingerprint of the pseudonymization key against the one
    /// the store was written with, and records it in a store that has none
    /// (new, or written by a build that did not record it). A different
    /// fingerprint is [`StoreError::KeyMismatch`].
    pub fn check_key_fingerprint(&self, fingerprint: &[u8; 32]) -> Result<KeyCheck, StoreError> {
        match self.db.get(KEY_FINGERPRINT)? {
            Some(v) if v.as_ref() == fingerprint => Ok(KeyCheck::Matches),
            Some(v) => Err(StoreError::KeyMismatch {
                stored: hex::encode(&v[..v.len().min(8)]),
                configured: hex::encode(&fingerprint[..8]),
            }),
            None => {
                let had_state = !self.partitions().is_empty();
                self.db.insert(KEY_FINGERPRINT, &fingerprint[..])?;
                self.db.flush()?;
                Ok(if had_state { KeyCheck::Adopted } else { KeyCheck::Recorded })
            }
        }
    }

    /// A name for the instance that owns this store: made once (16 hex
    /// digits from the process's random hasher seed, the time and the
    /// process id) and kept, so it stays the same across restarts.
    pub fn instance_name(&self) -> Result<String, StoreError> {
        if let Some(v) = self.db.get(INSTANCE_NAME)? {
            return Ok(String::from_utf8_lossy(&v).into_owned());
        }
        use std::hash::{BuildHasher, Hasher};
        let mut h = std::collections::hash_map::RandomState::new().build_hasher();
        let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap_or_default();
        h.write_u128(now.as_nanos());
        h.write_u32(std::process::id());
        let name = format!("{:016x}", h.finish());
        self.db.insert(INSTANCE_NAME, name.as_bytes())?;
        self.db.flush()?;
        Ok(name)
    }

    /// Names of the partitions that have state.
    pub fn partitions(&self) -> Vec<String> {
        self.db
            .tree_names()
            .into_iter()
            .filter_map(|n| String::from_utf8(n.to_vec()).ok())
            .filter_map(|n| n.strip_prefix("p/").map(str::to_string))
            .collect()
    }

    /// Stores the path statistics a model snapshot was fitted on, under its
    /// version (kept once; partitions name the snapshot they credit with).
    pub fn save_snapshot(
        &self,
        version: &str,
        stats: &apportion_engine::datadriven::PathStats,
    ) -> Result<(), StoreError> {
        let t = self.db.open_tree("snapshots")?;
        if !t.contains_key(version.as_bytes())? {
            t.insert(version.as_bytes(), codec::encode_stats(stats))?;
        }
        Ok(())
    }

    /// The path statistics of a stored snapshot.
    pub fn snapshot(
        &self,
        version: &str,
        markov_order: usize,
    ) -> Result<Option<apportion_engine::datadriven::PathStats>, StoreError> {
        let t = self.db.open_tree("snapshots")?;
        t.get(version.as_bytes())?.map(|b| codec::decode_stats(&b, markov_order)).transpose()
    }

    /// Deletes stored snapshots other than `keep`.
    pub fn prune_snapshots(&self, keep: &[&str]) -> Result<(), StoreError> {
        let t = self.db.open_tree("snapshots")?;
        for item in t.iter() {
            let (k, _) = item?;
            if !keep.iter().any(|v| v.as_bytes() == &k[..]) {
                t.remove(k)?;
            }
        }
        Ok(())
    }

    /// True when the store holds state for partition `name`.
    pub fn has_partition(&self, name: &str) -> bool {
        self.db.tree_names().iter().any(|n| n.as_ref() == format!("p/{name}").as_bytes())
    }

    /// The changelog offset the local state of partition `name` reflects
    /// (the offset of the last changelog record it has), if recorded.
    pub fn changelog_offset(&self, name: &str) -> Result<Option<i64>, StoreError> {
        if !self.has_partition(name) {
            return Ok(None);
        }
        changelog::changelog_offset(&self.db.open_tree(format!("p/{name}"))?)
    }

    /// Starts rebuilding partition `name` from its changelog: its local
    /// state is dropped at once (see [`Restore`]).
    pub fn restore(&self, name: &str) -> Result<Restore, StoreError> {
        self.db.drop_tree(format!("p/{name}"))?;
        let tree = self.db.open_tree(format!("p/{name}"))?;
        Ok(Restore { tree, db: self.db.clone(), pending: ChangeSet::default(), applied: 0 })
    }

    /// Every record of partition `name`'s local state as its changelog
    /// carries them, in key order (to publish a local state that no
    /// changelog holds yet).
    pub fn partition_records(&self, name: &str) -> Result<Vec<(sled::IVec, sled::IVec)>, StoreError> {
        let tree = self.db.open_tree(format!("p/{name}"))?;
        changelog::records(&tree).collect()
    }

    /// Records that the local state of partition `name` reflects its
    /// changelog up to `offset` (durable with the next flush).
    pub fn set_changelog_offset(&self, name: &str, offset: i64) -> Result<(), StoreError> {
        let tree = self.db.open_tree(format!("p/{name}"))?;
        tree.insert(changelog::CHANGELOG_OFFSET_KEY, &offset.to_be_bytes()[..])?;
        Ok(())
    }

    /// Drops a partition's state (e.g. after handing it to another instance).
    pub fn drop_partition(&self, name: &str) -> Result<bool, StoreError> {
        Ok(self.db.drop_tree(format!("p/{name}"))?)
    }

    /// The event time of the oldest event (touch or pending conversion)
    /// held in the committed journeys of every partition, and how many
    /// journeys were read; `None` when no journey is stored. A full scan of
    /// the journey records: run it off the processing thread. It stops early,
    /// returning `Ok(None)`, once `cancel` is set.
    pub fn oldest_journey_event(
        &self,
        cancel: &std::sync::atomic::AtomicBool,
    ) -> Result<Option<(i64, u64)>, StoreError> {
        let mut oldest: Option<i64> = None;
        let mut read = 0u64;
        for name in self.partitions() {
            let tree = self.db.open_tree(format!("p/{name}"))?;
            for item in tree.scan_prefix([partition::J]) {
                if read % 4096 == 0 && cancel.load(std::sync::atomic::Ordering::Relaxed) {
                    return Ok(None);
                }
                let (_, v) = item?;
                let stored = codec::decode_journey(&v)?;
                read += 1;
                let first =
                    [stored.journey.touches.first().map(|t| t.ts), stored.journey.pending.first().map(|c| c.ts)]
                        .into_iter()
                        .flatten()
                        .min();
                if let Some(t) = first {
                    oldest = Some(oldest.map_or(t, |o| o.min(t)));
                }
            }
        }
        Ok(oldest.map(|o| (o, read)))
    }

    /// Bytes on disk.
    pub fn size_on_disk(&self) -> u64 {
        self.db.size_on_disk().unwrap_or(0)
    }

    /// Makes everything written so far durable.
    pub fn flush(&self) -> Result<(), StoreError> {
        self.db.flush()?;
        Ok(())
    }
}
