//! A partition's state as a changelog: the records a commit publishes
//! (every key it sets or removes, then an end-of-commit marker), how a
//! partition is rebuilt from them, and which changelog offset the local
//! copy reflects.
//!
//! The marker makes a commit the unit of restore: records after the last
//! marker belong to a commit whose publication did not finish (the process
//! died in the middle) and are not applied. They stay in the log, though,
//! and the next commit's marker would cover them, so the restoring instance
//! publishes an undo first ([`Restored::undo`]): every key of that tail set
//! back to its restored value (or removed), then a marker. The log then
//! gives the restored state whatever compaction keeps (a later record of a
//! key wins).

use sled::IVec;

use crate::changes::ChangeSet;
use crate::codec::decode_offset;
use crate::StoreError;

/// The key of the end-of-commit marker. No state key starts with `~`.
pub const COMMIT_MARKER: &[u8] = b"~commit";

/// The local key holding the changelog offset the partition's local copy
/// reflects (never published itself).
pub(crate) const CHANGELOG_OFFSET_KEY: &[u8] = b"mchangelog";

/// The changelog offset a tree reflects, if recorded.
pub(crate) fn changelog_offset(tree: &sled::Tree) -> Result<Option<i64>, StoreError> {
    tree.get(CHANGELOG_OFFSET_KEY)?.map(|v| decode_offset(&v)).transpose()
}

/// Rebuilds one partition's state from its changelog, read from the
/// beginning: [`Restore::record`] for every record in order, then
/// [`Restore::finish`]. The partition's old local state is gone from the
/// moment [`crate::Store::restore`] returns.
pub struct Restore {
    pub(crate) tree: sled::Tree,
    pub(crate) db: sled::Db,
    pub(crate) pending: ChangeSet,
    pub(crate) applied: u64,
}

impl Restore {
    /// One changelog record: `value` `None` is a tombstone. A commit's
    /// records are written when its marker is read.
    pub fn record(&mut self, key: &[u8], value: Option<&[u8]>) -> Result<(), StoreError> {
        if key == COMMIT_MARKER {
            self.applied += self.pending.len() as u64;
            std::mem::take(&mut self.pending).apply(&self.tree)?;
            return Ok(());
        }
        match value {
            Some(v) => self.pending.set(IVec::from(key), IVec::from(v)),
            None => self.pending.remove(IVec::from(key)),
        }
        Ok(())
    }

    /// Ends the restore with the changelog read up to `read_through` (the
    /// offset of the last record read): records of an unfinished commit
    /// are dropped, the offset is recorded, and everything is made durable.
    pub fn finish(self, read_through: i64) -> Result<Restored, StoreError> {
        let mut undo = ChangeSet::default();
        let mut seen = std::collections::BTreeSet::new();
        for (key, _) in self.pending.iter() {
            if seen.insert(key.to_vec()) {
                match self.tree.get(key)? {
                    Some(v) => undo.set(IVec::from(key), v),
                    None => undo.remove(IVec::from(key)),
                }
            }
        }
        self.tree.insert(CHANGELOG_OFFSET_KEY, &read_through.to_be_bytes()[..])?;
        self.db.flush()?;
        Ok(Restored { applied: self.applied, undo })
    }
}

/// What a restore did.
#[derive(Debug)]
pub struct Restored {
    /// Records applied.
    pub applied: u64,
    /// Writes that undo the records of an unfinished commit at the end of
    /// the log (each of its keys back to the restored value, or removed):
    /// publish them, with a marker, before anything else (empty: nothing to
    /// undo).
    pub undo: ChangeSet,
}

/// Every record of a tree as a changelog carries it (the local changelog
/// offset left out), in key order.
pub(crate) fn records(tree: &sled::Tree) -> impl Iterator<Item = Result<(IVec, IVec), StoreError>> + '_ {
    tree.iter().filter_map(|item| match item {
        Ok((k, _)) if k.as_ref() == CHANGELOG_OFFSET_KEY => None,
        Ok(kv) => Some(Ok(kv)),
        Err(e) => Some(Err(e.into())),
    })
}
