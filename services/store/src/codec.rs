//! Versioned encoding of stored values. The first byte of every value is its
//! format version, so a later build can migrate or refuse old data instead
//! of misreading it.

use apportion_engine::Journey;

use crate::StoreError;

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

/// Decodes a journey record.
pub fn decode_journey(bytes: &[u8]) -> Result<StoredJourney, StoreError> {
    let corrupt = |d: &str| StoreError::Corrupt { prefix: 'j', detail: d.to_string() };
    let (&version, rest) = bytes.split_first().ok_or_else(|| corrupt("empty record"))?;
    if version != JOURNEY_FORMAT_VERSION {
        return Err(StoreError::UnknownVersion { found: version, expected: JOURNEY_FORMAT_VERSION });
    }
    if rest.len() < 9 {
        return Err(corrupt("record too short"));
    }
    let wake = (rest[0] == 1).then(|| i64::from_be_bytes(rest[1..9].try_into().expect("8 bytes")));
    let journey = bincode::deserialize(&rest[9..]).map_err(|e| corrupt(&e.to_string()))?;
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
