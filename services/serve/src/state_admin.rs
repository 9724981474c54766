//! `apportion state`: what the store holds per partition, and the
//! operator's way to reset a partition's watermark (for instance after a
//! producer with a wrong clock moved it far ahead before `max_future_skew`
//! was in place). Runs on the data directory of a stopped service: sled
//! holds a lock on it while `serve` runs, and opening it then fails with an
//! error that says so.

use std::path::Path;

use anyhow::{Context, Result};
use apportion_contract::time::format_ms;
use apportion_store::{Clock, KeyCheck, Store};

/// One partition's committed state, for `apportion state show`.
#[derive(Debug, Clone, serde::Serialize)]
pub struct PartitionInfo {
    /// `<topic>/<partition>`, `http/0` or `file/0`.
    pub partition: String,
    /// Committed input offset.
    pub offset: Option<i64>,
    /// Watermark (RFC 3339), if any.
    pub watermark: Option<String>,
    /// Largest event time applied (RFC 3339), if any.
    pub max_event_time: Option<String>,
    /// Open journeys.
    pub open_journeys: u64,
    /// Decisions recorded and not yet committed.
    pub pending_decisions: usize,
    /// The model snapshot the partition credits with.
    pub snapshot: Option<String>,
}

fn open(data_dir: &Path) -> Result<Store> {
    Store::open(data_dir).with_context(|| {
        format!("cannot open the store in {}; stop the service that uses it first", data_dir.display())
    })
}

/// The store of `data_dir` (a temporary one when `None`), checked against
/// the fingerprint of the pseudonymization key (a store written with
/// another key is refused: docs/contract.md, "Pseudonymization key").
pub fn open_keyed(data_dir: Option<&Path>, pseudo: &apportion_engine::Pseudonymizer) -> Result<Store> {
    let Some(dir) = data_dir else { return Ok(Store::temporary()?) };
    let store = Store::open(dir)?;
    if store.check_key_fingerprint(&pseudo.fingerprint())? == KeyCheck::Adopted {
        tracing::warn!(
            data_dir = %dir.display(),
            "the store had no key fingerprint (written by an earlier build): recorded the configured key's; \
             a store written with another key is refused from now on"
        );
    }
    Ok(store)
}

fn time(ms: i64) -> Option<String> {
    (ms != i64::MIN).then(|| format_ms(ms))
}

/// Every partition of the store.
pub fn show(data_dir: &Path) -> Result<Vec<PartitionInfo>> {
    let store = open(data_dir)?;
    let mut out = Vec::new();
    let mut names = store.partitions();
    names.sort();
    for name in names {
        let p = store.partition(&name, 0)?;
        let clock = p.clock()?;
        out.push(PartitionInfo {
            offset: p.offset(&name)?,
            watermark: time(clock.watermark),
            max_event_time: time(clock.max_ts),
            open_journeys: p.open_journeys(),
            pending_decisions: p.decisions()?.len(),
            snapshot: p.active_snapshot()?,
            partition: name,
        });
    }
    Ok(out)
}

/// Sets the watermark of `partition` to `to` (epoch ms; the largest event
/// time to `to` too), forgetting recorded processing-time advances. Journeys
/// already closed stay closed: this only stops later events from counting
/// as late. Returns the old and the new clock.
pub fn reset_watermark(data_dir: &Path, partition: &str, to: i64) -> Result<(Clock, Clock)> {
    let store = open(data_dir)?;
    if !store.partitions().iter().any(|n| n == partition) {
        let mut names = store.partitions();
        names.sort();
        anyhow::bail!("no partition {partition:?} in the store; it holds: {}", names.join(", "));
    }
    let mut p = store.partition(partition, 0)?;
    let before = p.clock()?;
    let after = Clock { max_ts: to, watermark: to };
    p.stage_clock(&after);
    p.stage_forget_decisions(i64::MAX)?;
    p.commit(true)?;
    store.flush()?;
    Ok((before, after))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reset_and_show() {
        let dir = tempfile::tempdir().unwrap();
        {
            let store = Store::open(dir.path()).unwrap();
            let mut p = store.partition("events/0", 1 << 20).unwrap();
            p.stage_clock(&Clock { max_ts: 253_402_300_799_999, watermark: 253_402_300_794_999 });
            p.stage_offset("events/0", 41);
            p.commit(true).unwrap();
        }
        let before = show(dir.path()).unwrap();
        assert_eq!(before[0].watermark.as_deref(), Some("9999-12-31T23:59:54.999Z"));
        let e = reset_watermark(dir.path(), "events/9", 0).unwrap_err().to_string();
        assert!(e.contains("events/0"), "{e}");
        let (old, new) = reset_watermark(dir.path(), "events/0", 1_780_000_000_000).unwrap();
        assert_eq!(old.watermark, 253_402_300_794_999);
        assert_eq!(new.watermark, 1_780_000_000_000);
        let after = show(dir.path()).unwrap();
        assert_eq!(after[0].watermark.as_deref(), Some("2026-05-28T20:26:40.000Z"));
        assert_eq!(after[0].offset, Some(41), "the offset is kept");
    }
}
