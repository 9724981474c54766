//! Event time: parsing, formatting and the [`Timestamp`] of output rows.
//!
//! Event time is held as signed epoch milliseconds (`i64`) everywhere inside
//! the service. Input accepts an RFC 3339 string or an integer of epoch
//! milliseconds; output is always RFC 3339 in UTC with exactly three fraction
//! digits (`2026-03-01T10:00:00.000Z`), so two rows for the same instant
//! print the same text (docs/contract.md, "Credit rows").
//!
//! Formatting is written out here (civil date from a day count, the
//! algorithm of Howard Hinnant's "chrono-Compatible Low-Level Date
//! Algorithms") instead of going through a date library, because every
//! output row formats one or two times and the writer must not allocate; a
//! property test checks it against the `time` crate for every accepted
//! instant.

use std::fmt;

use time::format_description::well_known::Rfc3339;
use time::OffsetDateTime;

/// Smallest accepted timestamp: 0001-01-01T00:00:00Z.
pub const MIN_TIMESTAMP_MS: i64 = -62_135_596_800_000;
/// Largest accepted timestamp: 9999-12-31T23:59:59.999Z.
pub const MAX_TIMESTAMP_MS: i64 = 253_402_300_799_999;

/// Parses an RFC 3339 timestamp into epoch milliseconds (sub-millisecond
/// digits are truncated towards the past).
pub fn parse_rfc3339_ms(s: &str) -> Option<i64> {
    let dt = OffsetDateTime::parse(s, &Rfc3339).ok()?;
    let nanos = dt.unix_timestamp_nanos();
    let ms = nanos.div_euclid(1_000_000);
    let ms = i64::try_from(ms).ok()?;
    in_range(ms).then_some(ms)
}

/// True when `ms` lies in the range this service accepts (years 1..=9999).
pub fn in_range(ms: i64) -> bool {
    (MIN_TIMESTAMP_MS..=MAX_TIMESTAMP_MS).contains(&ms)
}

/// [`in_range`] for a whole number that arrived as a float (a JSON integer
/// beyond `u64`).
pub fn in_range_f64(ms: f64) -> bool {
    (MIN_TIMESTAMP_MS as f64..=MAX_TIMESTAMP_MS as f64).contains(&ms)
}

/// (year, month, day) of a count of days since 1970-01-01 (proleptic
/// Gregorian calendar; Hinnant's `civil_from_days`).
fn civil_from_days(z: i64) -> (i64, u32, u32) {
    let z = z + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let y = yoe + era * 400;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let m = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    (if m <= 2 { y + 1 } else { y }, m, d)
}

fn push2(out: &mut Vec<u8>, v: u32) {
    out.push(b'0' + (v / 10) as u8);
    out.push(b'0' + (v % 10) as u8);
}

/// Appends the RFC 3339 form of `ms` (UTC, three fraction digits) to `out`.
/// Times outside years 1..=9999 (never accepted as input) are written as the
/// bare number so that nothing panics.
pub fn write_rfc3339(ms: i64, out: &mut Vec<u8>) {
    if !in_range(ms) {
        out.extend_from_slice(itoa::Buffer::new().format(ms).as_bytes());
        return;
    }
    let secs = ms.div_euclid(1000);
    let milli = ms.rem_euclid(1000) as u32;
    let days = secs.div_euclid(86_400);
    let sod = secs.rem_euclid(86_400) as u32;
    let (y, m, d) = civil_from_days(days);
    let y = y as u32;
    push2(out, y / 100);
    push2(out, y % 100);
    out.push(b'-');
    push2(out, m);
    out.push(b'-');
    push2(out, d);
    out.push(b'T');
    push2(out, sod / 3600);
    out.push(b':');
    push2(out, sod / 60 % 60);
    out.push(b':');
    push2(out, sod % 60);
    out.push(b'.');
    out.push(b'0' + (milli / 100) as u8);
    push2(out, milli % 100);
    out.push(b'Z');
}

/// Formats epoch milliseconds as RFC 3339 UTC with exactly three fraction digits.
pub fn format_ms(ms: i64) -> String {
    let mut out = Vec::with_capacity(24);
    write_rfc3339(ms, &mut out);
    String::from_utf8(out).expect("ASCII")
}

/// The UTC calendar date (`YYYY-MM-DD`) of epoch milliseconds.
pub fn date_of_ms(ms: i64) -> String {
    let mut s = format_ms(ms);
    s.truncate(10);
    s
}

/// An instant of an output row: epoch milliseconds, written as RFC 3339
/// (UTC, milliseconds) only at the output edge.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct Timestamp(pub i64);

impl Timestamp {
    /// Epoch milliseconds.
    pub const fn ms(self) -> i64 {
        self.0
    }
}

impl fmt::Display for Timestamp {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let mut buf = Vec::with_capacity(24);
        write_rfc3339(self.0, &mut buf);
        f.write_str(std::str::from_utf8(&buf).expect("ASCII"))
    }
}

impl serde::Serialize for Timestamp {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut buf = Vec::with_capacity(24);
        write_rfc3339(self.0, &mut buf);
        s.serialize_str(std::str::from_utf8(&buf).expect("ASCII"))
    }
}

impl<'de> serde::Deserialize<'de> for Timestamp {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        let s = <std::borrow::Cow<'de, str>>::deserialize(d)?;
        parse_rfc3339_ms(&s)
            .map(Timestamp)
            .ok_or_else(|| serde::de::Error::custom(format!("not an RFC 3339 time: {s:?}")))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn rfc3339_forms() {
        // RFC 3339 section 5.8 examples (offsets and fractions).
        assert_eq!(parse_rfc3339_ms("1985-04-12T23:20:50.52Z"), Some(482196050520));
        assert_eq!(parse_rfc3339_ms("1996-12-19T16:39:57-08:00"), Some(851042397000));
        assert_eq!(parse_rfc3339_ms("1970-01-01T00:00:00Z"), Some(0));
        assert_eq!(parse_rfc3339_ms("not a time"), None);
        assert_eq!(parse_rfc3339_ms("2026-02-30T00:00:00Z"), None);
    }

    #[test]
    fn format_round_trip() {
        // 482196050520 ms is RFC 3339's 1985-04-12T23:20:50.52Z (above).
        assert_eq!(format_ms(482196050520), "1985-04-12T23:20:50.520Z");
        assert_eq!(format_ms(0), "1970-01-01T00:00:00.000Z");
        assert_eq!(format_ms(-1), "1969-12-31T23:59:59.999Z");
        assert_eq!(format_ms(MAX_TIMESTAMP_MS), "9999-12-31T23:59:59.999Z");
        assert_eq!(format_ms(MIN_TIMESTAMP_MS), "0001-01-01T00:00:00.000Z");
        assert_eq!(date_of_ms(482196050520), "1985-04-12");
        for ms in [0, 1, 999, 1_700_000_000_123, -86_400_001, MAX_TIMESTAMP_MS, MIN_TIMESTAMP_MS] {
            assert_eq!(parse_rfc3339_ms(&format_ms(ms)), Some(ms));
        }
    }

    /// The reference: the `time` crate's own calendar arithmetic.
    fn reference(ms: i64) -> String {
        let dt = OffsetDateTime::from_unix_timestamp(ms.div_euclid(1000)).unwrap();
        format!(
            "{:04}-{:02}-{:02}T{:02}:{:02}:{:02}.{:03}Z",
            dt.year(),
            u8::from(dt.month()),
            dt.day(),
            dt.hour(),
            dt.minute(),
            dt.second(),
            ms.rem_euclid(1000)
        )
    }

    proptest! {
        #[test]
        fn formatter_agrees_with_the_time_crate(ms in MIN_TIMESTAMP_MS..=MAX_TIMESTAMP_MS) {
            prop_assert_eq!(format_ms(ms), reference(ms));
        }
    }

    #[test]
    fn leap_days_and_century_rules() {
        // Gregorian rules (common knowledge of the calendar, no source needed
        // beyond it): 2000 was a leap year, 1900 and 2100 are not.
        for ms in [951_782_400_000, 951_868_799_999, -2_203_891_200_000, 4_107_542_400_000] {
            assert_eq!(format_ms(ms), reference(ms));
        }
        assert_eq!(format_ms(951_782_400_000), "2000-02-29T00:00:00.000Z");
    }
}
