//! Fast RFC 3339 formatting for the generators (no allocation per event).
//!
//! The calendar conversion is the `civil_from_days` algorithm from Howard
//! Hinnant's "chrono-Compatible Low-Level Date Algorithms" (public domain);
//! the test compares it with the engine's formatter, which uses the `time`
//! crate.

/// Epoch milliseconds as `YYYY-MM-DDTHH:MM:SS.mmmZ` (years 0..=9999).
pub fn rfc3339_ms(ms: i64, out: &mut [u8; 24]) -> &str {
    let secs = ms.div_euclid(1000);
    let milli = ms.rem_euclid(1000) as u32;
    let days = secs.div_euclid(86_400);
    let sod = secs.rem_euclid(86_400) as u32;
    let (y, m, d) = civil_from_days(days);
    let y = y.clamp(0, 9999) as u32;
    let put = |out: &mut [u8; 24], at: usize, v: u32, width: usize| {
        let mut v = v;
        for i in (0..width).rev() {
            out[at + i] = b'0' + (v % 10) as u8;
            v /= 10;
        }
    };
    put(out, 0, y, 4);
    out[4] = b'-';
    put(out, 5, m, 2);
    out[7] = b'-';
    put(out, 8, d, 2);
    out[10] = b'T';
    put(out, 11, sod / 3600, 2);
    out[13] = b':';
    put(out, 14, sod / 60 % 60, 2);
    out[16] = b':';
    put(out, 17, sod % 60, 2);
    out[19] = b'.';
    put(out, 20, milli, 3);
    out[23] = b'Z';
    std::str::from_utf8(&out[..]).expect("ASCII")
}

/// (year, month, day) of a day count since 1970-01-01 (proleptic Gregorian).
pub fn civil_from_days(z: i64) -> (i64, u32, u32) {
    let z = z + 719_468;
    let era = if z >= 0 { z } else { z - 146_096 } / 146_097;
    let doe = (z - era * 146_097) as u64; // [0, 146096]
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365; // [0, 399]
    let y = yoe as i64 + era * 400;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100); // [0, 365]
    let mp = (5 * doy + 2) / 153; // [0, 11]
    let d = (doy - (153 * mp + 2) / 5 + 1) as u32;
    let m = if mp < 10 { mp + 3 } else { mp - 9 } as u32;
    (if m <= 2 { y + 1 } else { y }, m, d)
}

#[cfg(test)]
mod tests {
    use super::*;
    use apportion_engine::contract::time::format_ms;
    use rand::{Rng, SeedableRng};

    #[test]
    fn same_text_as_the_engine() {
        let mut buf = [0u8; 24];
        // Leap days, century rules and the epoch, then random instants.
        let fixed = [
            0i64,
            -1,
            951_782_400_000,     // 2000-02-29 (leap: divisible by 400)
            4_107_456_000_000,   // 2100-02-28 (2100 is not a leap year)
            4_107_542_399_999,   // 2100-02-28T23:59:59.999
            1_772_323_200_000,   // 2026-03-01
            253_402_300_799_999, // 9999-12-31T23:59:59.999
            -62_135_596_800_000, // 0001-01-01
        ];
        for ms in fixed {
            assert_eq!(rfc3339_ms(ms, &mut buf), format_ms(ms), "{ms}");
        }
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        for _ in 0..100_000 {
            let ms = rng.gen_range(-62_135_596_800_000i64..=253_402_300_799_999);
            assert_eq!(rfc3339_ms(ms, &mut buf), format_ms(ms), "{ms}");
        }
    }
}
