//! Event-time parsing and formatting.
//!
//! Event time is held as signed epoch milliseconds (`i64`). Input accepts an
//! RFC 3339 string or an integer of epoch milliseconds; output is always
//! RFC 3339 in UTC with millisecond precision (`2026-03-01T10:00:00.000Z`), so
//! two rows for the same instant always print the same text.

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

/// Formats epoch milliseconds as RFC 3339 UTC with exactly three fraction digits.
pub fn format_ms(ms: i64) -> String {
    let secs = ms.div_euclid(1000);
    let milli = ms.rem_euclid(1000);
    match OffsetDateTime::from_unix_timestamp(secs) {
        Ok(dt) => format!(
            "{:04}-{:02}-{:02}T{:02}:{:02}:{:02}.{:03}Z",
            dt.year(),
            u8::from(dt.month()),
            dt.day(),
            dt.hour(),
            dt.minute(),
            dt.second(),
            milli
        ),
        // Unreachable for validated input; keep the number rather than panic.
        Err(_) => ms.to_string(),
    }
}

/// The UTC calendar date (`YYYY-MM-DD`) of epoch milliseconds.
pub fn date_of_ms(ms: i64) -> String {
    format_ms(ms)[..10].to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

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
        assert_eq!(format_ms(482196050520), "1985-04-12T23:20:50.520Z");
        assert_eq!(format_ms(0), "1970-01-01T00:00:00.000Z");
        assert_eq!(format_ms(-1), "1969-12-31T23:59:59.999Z");
        for ms in [0, 1, 999, 1_700_000_000_123, -86_400_001, MAX_TIMESTAMP_MS, MIN_TIMESTAMP_MS] {
            assert_eq!(parse_rfc3339_ms(&format_ms(ms)), Some(ms));
        }
    }
}
