//! A partition's path statistics as keyed counters (format version 2),
//! written per change: one key per channel-set outcome and per Markov
//! transition, plus one header key with the totals. A commit writes only
//! the counters its batch changed ([`apportion_engine::datadriven::StatsDelta`]),
//! each with its current value (not an increment, so writing one twice is
//! harmless), in the same sled batch as the journeys and offsets.
//!
//! | key | value |
//! | --- | --- |
//! | `p` `h` | header: format version (1 byte, 2), Markov order (1 byte), paths (8 bytes BE), converting paths (8 bytes BE) |
//! | `p` `s` + channel list | converting paths (8 bytes BE), non-converting paths (8 bytes BE) with exactly that set of distinct channels |
//! | `p` `t` + node + node | count of the transition from the first node to the second (8 bytes BE) |
//!
//! A channel list is its length (4 bytes BE) then each name as its length
//! (2 bytes BE) and its UTF-8 bytes; a set's names are sorted byte-wise, a
//! state's are in path order (oldest first). A node is a tag byte, `0`
//! START, `1` a state followed by its channel list, `2` CONVERSION, `3`
//! NULL. Keys name channels, never interned ids, so loading does not
//! depend on the order anything was counted in. The overflow bucket of the
//! channel cap is the channel named `"\0overflow"`.
//!
//! Version 1 was one JSON record of the whole statistics under `m` `stats`,
//! rewritten at every commit; a store holding one is converted the first
//! time its statistics are read (the conversion is staged with the next
//! commit, and the record deleted in the same batch).

use apportion_engine::datadriven::{Counter, Outcomes, PathStats, StatsDelta, StatsNode};

use crate::changes::ChangeSet;
use crate::StoreError;

/// Key prefix of the counters.
pub(crate) const P: u8 = b'p';
/// Format version of the counters (version 1 was the JSON record).
pub const STATS_COUNTERS_VERSION: u8 = 2;

const HEADER: u8 = b'h';
const SET: u8 = b's';
const TRANSITION: u8 = b't';

fn corrupt(detail: impl Into<String>) -> StoreError {
    StoreError::Corrupt { prefix: 'p', detail: detail.into() }
}

pub(crate) fn header_key() -> Vec<u8> {
    vec![P, HEADER]
}

fn put_list(out: &mut Vec<u8>, names: &[String]) {
    out.extend_from_slice(&(names.len() as u32).to_be_bytes());
    for n in names {
        // Channel names are at most 256 bytes (docs/contract.md); a longer
        // name given to the engine directly would not fit 2 bytes.
        let len = u16::try_from(n.len()).expect("channel names are shorter than 64 KiB");
        out.extend_from_slice(&len.to_be_bytes());
        out.extend_from_slice(n.as_bytes());
    }
}

fn put_node(out: &mut Vec<u8>, n: &StatsNode) {
    match n {
        StatsNode::Start => out.push(0),
        StatsNode::State(v) => {
            out.push(1);
            put_list(out, v);
        }
        StatsNode::Conversion => out.push(2),
        StatsNode::Null => out.push(3),
    }
}

/// The key and value of a counter.
pub(crate) fn encode_counter(c: &Counter) -> (Vec<u8>, Vec<u8>) {
    match c {
        Counter::Set { channels, outcomes } => {
            let mut k = vec![P, SET];
            put_list(&mut k, channels);
            let mut v = Vec::with_capacity(16);
            v.extend_from_slice(&outcomes.conversions.to_be_bytes());
            v.extend_from_slice(&outcomes.non_conversions.to_be_bytes());
            (k, v)
        }
        Counter::Transition { from, to, count } => {
            let mut k = vec![P, TRANSITION];
            put_node(&mut k, from);
            put_node(&mut k, to);
            (k, count.to_be_bytes().to_vec())
        }
    }
}

pub(crate) fn encode_header(order: usize, paths: u64, conversions: u64) -> Vec<u8> {
    let mut v = Vec::with_capacity(18);
    v.push(STATS_COUNTERS_VERSION);
    v.push(order as u8);
    v.extend_from_slice(&paths.to_be_bytes());
    v.extend_from_slice(&conversions.to_be_bytes());
    v
}

/// Reads from a key, failing on truncation.
struct Reader<'a>(&'a [u8]);

impl<'a> Reader<'a> {
    fn take(&mut self, n: usize) -> Result<&'a [u8], StoreError> {
        if self.0.len() < n {
            return Err(corrupt("truncated counter key"));
        }
        let (a, b) = self.0.split_at(n);
        self.0 = b;
        Ok(a)
    }

    fn list(&mut self) -> Result<Vec<String>, StoreError> {
        let n = u32::from_be_bytes(self.take(4)?.try_into().expect("4 bytes")) as usize;
        let mut out = Vec::with_capacity(n.min(1024));
        for _ in 0..n {
            let len = u16::from_be_bytes(self.take(2)?.try_into().expect("2 bytes")) as usize;
            let name = std::str::from_utf8(self.take(len)?).map_err(|_| corrupt("channel name is not UTF-8"))?;
            out.push(name.to_string());
        }
        Ok(out)
    }

    fn node(&mut self) -> Result<StatsNode, StoreError> {
        Ok(match self.take(1)?[0] {
            0 => StatsNode::Start,
            1 => StatsNode::State(self.list()?),
            2 => StatsNode::Conversion,
            3 => StatsNode::Null,
            t => return Err(corrupt(format!("unknown node tag {t}"))),
        })
    }
}

fn u64_at(v: &[u8], at: usize) -> Result<u64, StoreError> {
    v.get(at..at + 8)
        .map(|b| u64::from_be_bytes(b.try_into().expect("8 bytes")))
        .ok_or_else(|| corrupt("counter value too short"))
}

/// Decodes one counter key and value (not the header).
fn decode_counter(k: &[u8], v: &[u8]) -> Result<Counter, StoreError> {
    let mut r = Reader(k.get(2..).ok_or_else(|| corrupt("counter key too short"))?);
    let c = match k[1] {
        SET => {
            if v.len() != 16 {
                return Err(corrupt(format!("set counter of {} bytes, expected 16", v.len())));
            }
            Counter::Set {
                channels: r.list()?,
                outcomes: Outcomes { conversions: u64_at(v, 0)?, non_conversions: u64_at(v, 8)? },
            }
        }
        TRANSITION => {
            if v.len() != 8 {
                return Err(corrupt(format!("transition counter of {} bytes, expected 8", v.len())));
            }
            let from = r.node()?;
            let to = r.node()?;
            Counter::Transition { from, to, count: u64_at(v, 0)? }
        }
        t => return Err(corrupt(format!("unknown counter kind {:?}", t as char))),
    };
    if !r.0.is_empty() {
        return Err(corrupt("trailing bytes in a counter key"));
    }
    Ok(c)
}

/// The statistics stored as counters in `tree`, if there are any; an error
/// when they are of another Markov order than `markov_order`.
pub(crate) fn load(tree: &sled::Tree, markov_order: usize) -> Result<Option<PathStats>, StoreError> {
    let Some(h) = tree.get(header_key())? else {
        if tree.scan_prefix([P]).next().is_some() {
            return Err(corrupt("path-statistics counters without their header"));
        }
        return Ok(None);
    };
    match h.first() {
        Some(&STATS_COUNTERS_VERSION) if h.len() == 18 => {}
        Some(&STATS_COUNTERS_VERSION) => return Err(corrupt(format!("header of {} bytes, expected 18", h.len()))),
        Some(&v) => return Err(StoreError::UnknownVersion { found: v, expected: STATS_COUNTERS_VERSION }),
        None => return Err(corrupt("empty header")),
    }
    let order = h[1] as usize;
    if order != markov_order {
        return Err(StoreError::MarkovOrder { stored: order, configured: markov_order });
    }
    let (paths, conversions) = (u64_at(&h, 2)?, u64_at(&h, 10)?);
    let mut counters = Vec::new();
    for item in tree.scan_prefix([P]) {
        let (k, v) = item?;
        if k.as_ref() == header_key().as_slice() {
            continue;
        }
        counters.push(decode_counter(&k, &v)?);
    }
    PathStats::from_counters(order, paths, conversions, counters)
        .map(Some)
        .map_err(|e| corrupt(format!("path statistics: {e}")))
}

/// Stages the writes of `delta` (changes of `stats`): the changed counters
/// and the header; for a full delta, first the removal of every counter
/// stored in `tree`. Nothing for an empty delta.
pub(crate) fn stage_delta(
    tree: &sled::Tree,
    stats: &PathStats,
    delta: &StatsDelta,
    out: &mut ChangeSet,
) -> Result<(), StoreError> {
    if delta.is_empty() {
        return Ok(());
    }
    if delta.full {
        stage_drop(tree, out)?;
    }
    let mut writes: Vec<(Vec<u8>, Vec<u8>)> = delta.counters.iter().map(encode_counter).collect();
    // In key order: the same changes give the same change set.
    writes.sort_unstable();
    for (k, v) in writes {
        out.set(k, v);
    }
    out.set(header_key(), encode_header(stats.markov_order(), stats.paths(), stats.conversions()));
    Ok(())
}

/// Stages the removal of every counter in `tree`; returns how many.
pub(crate) fn stage_drop(tree: &sled::Tree, out: &mut ChangeSet) -> Result<usize, StoreError> {
    let mut n = 0;
    for item in tree.scan_prefix([P]) {
        out.remove(item?.0);
        n += 1;
    }
    Ok(n)
}
