//! The writes of one commit as a value: every key a partition's commit sets
//! to new bytes or removes (a tombstone), in order. The store applies it to
//! sled as one atomic batch and hands it back, so the same set can be
//! shipped elsewhere (a changelog) and applied to another store to rebuild
//! the same state.

use sled::IVec;

/// One commit's writes, in order (a later write of the same key wins).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct ChangeSet {
    writes: Vec<(IVec, Option<IVec>)>,
}

impl ChangeSet {
    /// Sets `key` to `value`.
    pub fn set(&mut self, key: impl Into<IVec>, value: impl Into<IVec>) {
        self.writes.push((key.into(), Some(value.into())));
    }

    /// Removes `key` (a tombstone).
    pub fn remove(&mut self, key: impl Into<IVec>) {
        self.writes.push((key.into(), None));
    }

    /// Appends every write of `other`, after this set's.
    pub fn extend(&mut self, other: ChangeSet) {
        self.writes.extend(other.writes);
    }

    /// The writes, in order: key, and the new bytes or `None` for a removal.
    pub fn iter(&self) -> impl Iterator<Item = (&[u8], Option<&[u8]>)> {
        self.writes.iter().map(|(k, v)| (k.as_ref(), v.as_deref()))
    }

    /// Number of writes.
    pub fn len(&self) -> usize {
        self.writes.len()
    }

    /// True when there is nothing to write.
    pub fn is_empty(&self) -> bool {
        self.writes.is_empty()
    }

    /// Applies every write to `tree` in one atomic batch.
    pub(crate) fn apply(&self, tree: &sled::Tree) -> Result<(), sled::Error> {
        tree.apply_batch(self.batch())
    }

    /// Every write as one sled batch.
    pub(crate) fn batch(&self) -> sled::Batch {
        let mut batch = sled::Batch::default();
        for (k, v) in &self.writes {
            // Cloning an IVec shares its bytes (no copy for large values).
            match v {
                Some(v) => batch.insert(k.clone(), v.clone()),
                None => batch.remove(k.clone()),
            }
        }
        batch
    }
}
