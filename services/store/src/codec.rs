//! Every persisted format of the store, in one place. The first byte of
//! every value is its format version, so a later build can migrate or
//! refuse old data instead of misreading it.
//!
//! | record | version | layout |
//! | --- | --- | --- |
//! | journey | 1 | version, wake flag (1 byte), wake (8 bytes big endian), bincode of [`Journey`] |
//! | clock | 1 | version, largest event time seen (8 bytes BE), watermark (8 bytes BE) |
//! | path statistics (snapshots; partitions before counter keys) | 1 | version, JSON of [`PathStats`] (the serde form documented there) |
//! | path-statistics counters (key `p` ...) | 2 | see `stats_keys.rs` |
//! | input offset | none | 8 bytes big endian (a bare offset, unchanged since the first release) |
//! | decision (key `d` + offset + kind) | none | `f`: a future-dated event rejected at that offset (empty value); `a`: a processing-time advance of the watermark after that offset (8 bytes BE) |
//! | active snapshot (`m` `snapshot`) | none | the `model_version` the partition credits with (UTF-8) |
//! | snapshot (tree `snapshots`, key = version) | 1 | as path statistics |

use apportion_engine::datadriven::PathStats;
use apportion_engine::Journey;

use crate::StoreError;

/// Current format version of clock records.
pub const CLOCK_FORMAT_VERSION: u8 = 1;
/// Current format version of path-statistics records (the JSON form of
/// snapshots; also the per-partition blob of earlier builds).
pub const STATS_FORMAT_VERSION: u8 = 1;

/// A partition's event-time clock: the largest event time seen and the
/// watermark (both `i64::MIN` before any event).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Clock {
    /// Largest event time applied.
    pub max_ts: i64,
    /// Current watermark.
    pub watermark: i64,
}

impl Default for Clock {
    fn default() -> Self {
        Clock { max_ts: i64::MIN, watermark: i64::MIN }
    }
}

/// Encodes a clock record.
pub fn encode_clock(c: &Clock) -> Vec<u8> {
    let mut b = Vec::with_capacity(17);
    b.push(CLOCK_FORMAT_VERSION);
    b.extend_from_slice(&c.max_ts.to_be_bytes());
    b.extend_from_slice(&c.watermark.to_be_bytes());
    b
}

/// Decodes a clock record.
pub fn decode_clock(b: &[u8]) -> Result<Clock, StoreError> {
    match b.first() {
        Some(&CLOCK_FORMAT_VERSION) if b.len() == 17 => Ok(Clock {
            max_ts: i64::from_be_bytes(b[1..9].try_into().expect("8 bytes")),
            watermark: i64::from_be_bytes(b[9..17].try_into().expect("8 bytes")),
        }),
        Some(&CLOCK_FORMAT_VERSION) => {
            Err(StoreError::Corrupt { prefix: 'm', detail: format!("clock record of {} bytes, expected 17", b.len()) })
        }
        Some(&v) => Err(StoreError::UnknownVersion { found: v, expected: CLOCK_FORMAT_VERSION }),
        None => Err(StoreError::Corrupt { prefix: 'm', detail: "empty clock record".into() }),
    }
}

/// Encodes a path-statistics record.
pub fn encode_stats(stats: &PathStats) -> Vec<u8> {
    let mut b = vec![STATS_FORMAT_VERSION];
    serde_json::to_writer(&mut b, stats).expect("statistics serialize");
    b
}

/// Decodes a path-statistics record, refusing statistics of another Markov
/// order than `markov_order` (they cannot be merged with this
/// configuration's).
pub fn decode_stats(b: &[u8], markov_order: usize) -> Result<PathStats, StoreError> {
    match b.split_first() {
        Some((&STATS_FORMAT_VERSION, body)) => {
            let stats: PathStats = serde_json::from_slice(body)
                .map_err(|e| StoreError::Corrupt { prefix: 'm', detail: format!("path statistics: {e}") })?;
            if stats.markov_order() != markov_order {
                return Err(StoreError::MarkovOrder { stored: stats.markov_order(), configured: markov_order });
            }
            Ok(stats)
        }
        Some((&v, _)) => Err(StoreError::UnknownVersion { found: v, expected: STATS_FORMAT_VERSION }),
        None => Err(StoreError::Corrupt { prefix: 'm', detail: "empty path statistics record".into() }),
    }
}

/// Decodes a stored input offset.
pub fn decode_offset(b: &[u8]) -> Result<i64, StoreError> {
    let a: [u8; 8] = b
        .try_into()
        .map_err(|_| StoreError::Corrupt { prefix: 'o', detail: format!("offset of {} bytes, expected 8", b.len()) })?;
    Ok(i64::from_be_bytes(a))
}

/// Current format version of journey records.
pub const JOURNEY_FORMAT_VERSION: u8 = 1;

/// A journey as stored, with its wake time.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredJourney {
    /// Next wake-up watermark.
    pub wake: Option<i64>,
    /// The journey.
    pub journey: Journey,
}

/// Encodes a journey record: version, wake flag and time, bincode body.
pub fn encode_journey(wake: Option<i64>, journey: &Journey) -> Vec<u8> {
    let mut out = Vec::with_capacity(64);
    out.push(JOURNEY_FORMAT_VERSION);
    match wake {
        Some(w) => {
            out.push(1);
            out.extend_from_slice(&w.to_be_bytes());
        }
        None => {
            out.push(0);
            out.extend_from_slice(&[0; 8]);
        }
    }
    bincode::serialize_into(&mut out, journey).expect("journeys always serialize");
    out
}

/// The wake time of a journey record and the encoded journey after it,
/// checking the version and length (the journey is not decoded).
pub(crate) fn journey_header(bytes: &[u8]) -> Result<(Option<i64>, &[u8]), StoreError> {
    let corrupt = |d: &str| StoreError::Corrupt { prefix: 'j', detail: d.to_string() };
    let (&version, rest) = bytes.split_first().ok_or_else(|| corrupt("empty record"))?;
    if version != JOURNEY_FORMAT_VERSION {
        return Err(StoreError::UnknownVersion { found: version, expected: JOURNEY_FORMAT_VERSION });
    }
    if rest.len() < 9 {
        return Err(corrupt("record too short"));
    }
    let wake = (rest[0] == 1).then(|| i64::from_be_bytes(rest[1..9].try_into().expect("8 bytes")));
    Ok((wake, &rest[9..]))
}

/// Decodes a journey record.
pub fn decode_journey(bytes: &[u8]) -> Result<StoredJourney, StoreError> {
    let (wake, body) = journey_header(bytes)?;
    let journey = bincode::deserialize(body).map_err(|e| StoreError::Corrupt { prefix: 'j', detail: e.to_string() })?;
    Ok(StoredJourney { wake, journey })
}

/// Order-preserving encoding of an i64 (sign bit flipped, big endian).
pub(crate) fn ordered_i64(v: i64) -> [u8; 8] {
    ((v as u64) ^ (1 << 63)).to_be_bytes()
}

/// Inverse of [`ordered_i64`].
pub(crate) fn from_ordered_i64(b: &[u8]) -> i64 {
    (u64::from_be_bytes(b.try_into().expect("8 bytes")) ^ (1 << 63)) as i64
}

/// A decision that depended on processing time (or on where a batch
/// ended), recorded with the input offset it applies at, so that a
/// redelivery of the same messages makes it again (docs/contract.md,
/// "Determinism").
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord)]
pub enum Decision {
    /// The event at `offset` was rejected as too far in the future.
    FutureRejected {
        /// Offset of the event.
        offset: i64,
    },
    /// After the message at `after_offset`, the watermark moved to
    /// `watermark` by processing time (an idle partition).
    Advance {
        /// Offset of the last message before the advance.
        after_offset: i64,
        /// The new watermark.
        watermark: i64,
    },
    /// The output of the messages up to `through_offset` was written (or
    /// about to be) before their commit, credited with the model snapshot
    /// `snapshot`: a redelivery credits with it up to that offset, so the
    /// rows it writes again are the same rows.
    OutputWritten {
        /// Offset of the batch's last message.
        through_offset: i64,
        /// Version of the snapshot the output was credited with.
        snapshot: String,
    },
}

impl Decision {
    /// The offset the decision is keyed by.
    pub fn offset(&self) -> i64 {
        match *self {
            Decision::FutureRejected { offset } => offset,
            Decision::Advance { after_offset, .. } => after_offset,
            Decision::OutputWritten { through_offset, .. } => through_offset,
        }
    }

    pub(crate) fn key(&self) -> Vec<u8> {
        let mut k = Vec::with_capacity(10);
        k.push(b'd');
        k.extend_from_slice(&ordered_i64(self.offset()));
        k.push(match self {
            Decision::FutureRejected { .. } => b'f',
            Decision::Advance { .. } => b'a',
            Decision::OutputWritten { .. } => b'w',
        });
        k
    }

    pub(crate) fn value(&self) -> Vec<u8> {
        match self {
            Decision::FutureRejected { .. } => Vec::new(),
            Decision::Advance { watermark, .. } => watermark.to_be_bytes().to_vec(),
            Decision::OutputWritten { snapshot, .. } => snapshot.as_bytes().to_vec(),
        }
    }

    pub(crate) fn decode(key: &[u8], value: &[u8]) -> Result<Decision, StoreError> {
        let corrupt = |d: &str| StoreError::Corrupt { prefix: 'd', detail: d.to_string() };
        if key.len() != 10 {
            return Err(corrupt("decision key of the wrong length"));
        }
        let offset = from_ordered_i64(&key[1..9]);
        match key[9] {
            b'f' => Ok(Decision::FutureRejected { offset }),
            b'w' => match std::str::from_utf8(value) {
                Ok(v) if !v.is_empty() => {
                    Ok(Decision::OutputWritten { through_offset: offset, snapshot: v.to_string() })
                }
                _ => Err(corrupt("output mark without a snapshot version")),
            },
            b'a' => {
                let w: [u8; 8] = value.try_into().map_err(|_| corrupt("advance without an 8-byte watermark"))?;
                Ok(Decision::Advance { after_offset: offset, watermark: i64::from_be_bytes(w) })
            }
            _ => Err(corrupt("unknown decision kind")),
        }
    }
}

#[cfg(test)]
mod decision_tests {
    use super::*;

    /// Every kind reads back as written, and keys sort by offset first
    /// (a commit forgets the decisions at or before its offset by a range).
    /// Values derived by hand from the key layout in lib.rs (`d` + offset
    /// + kind).
    #[test]
    fn decisions_read_back_and_sort_by_offset() {
        let all = [
            Decision::OutputWritten { through_offset: -1, snapshot: "o1-ab".into() },
            Decision::FutureRejected { offset: 7 },
            Decision::Advance { after_offset: 7, watermark: -5 },
            Decision::OutputWritten { through_offset: 8, snapshot: "o2-cd".into() },
        ];
        for d in &all {
            assert_eq!(&Decision::decode(&d.key(), &d.value()).unwrap(), d);
        }
        assert!(Decision::decode(&all[0].key(), &[]).is_err(), "an output mark names its snapshot");
        let mut keys: Vec<Vec<u8>> = all.iter().rev().map(Decision::key).collect();
        keys.sort();
        let offsets: Vec<i64> = keys.iter().map(|k| from_ordered_i64(&k[1..9])).collect();
        assert_eq!(offsets, [-1, 7, 7, 8]);
        let mut bad = all[0].key();
        bad[9] = b'?';
        assert!(Decision::decode(&bad, &[]).is_err());
    }
}
