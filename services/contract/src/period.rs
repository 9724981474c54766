//! Configured durations (lookback, expiry, half-life, ...) written as `30d`,
//! `12h`, `90m`, `45s`, `250ms` or `2w`. Named `Period` rather than `Span`
//! so that it is not mistaken for a tracing span, nor for
//! `std::time::Duration`, which it converts to with [`Period::to_std`].

use std::fmt;

/// A non-negative duration in milliseconds, parsed from and printed as text.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Default)]
pub struct Period(pub i64);

/// Why a duration could not be read.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("invalid duration {input:?}: expected a whole number followed by ms, s, m, h, d or w (e.g. 30d, 12h, 90m)")]
pub struct PeriodError {
    /// The text that was rejected.
    pub input: String,
}

impl Period {
    /// Milliseconds in one day.
    pub const DAY: i64 = 86_400_000;

    /// Builds a span of `d` days.
    pub const fn days(d: i64) -> Period {
        Period(d * Self::DAY)
    }

    /// Builds a span of `s` seconds.
    pub const fn seconds(s: i64) -> Period {
        Period(s * 1000)
    }

    /// Milliseconds.
    pub const fn ms(self) -> i64 {
        self.0
    }

    /// As a `std::time::Duration` (negative values count as zero).
    pub fn to_std(self) -> std::time::Duration {
        std::time::Duration::from_millis(self.0.max(0) as u64)
    }

    /// Parses `30d`, `12h`, `90m`, `45s`, `250ms`, `2w`, or a combination such
    /// as `1d12h`. A bare `0` is allowed.
    pub fn parse(input: &str) -> Result<Period, PeriodError> {
        let err = || PeriodError { input: input.to_string() };
        let s = input.trim();
        if s == "0" {
            return Ok(Period(0));
        }
        if s.is_empty() {
            return Err(err());
        }
        let bytes = s.as_bytes();
        let mut i = 0;
        let mut total: i64 = 0;
        while i < bytes.len() {
            let start = i;
            while i < bytes.len() && bytes[i].is_ascii_digit() {
                i += 1;
            }
            if start == i {
                return Err(err());
            }
            let n: i64 = s[start..i].parse().map_err(|_| err())?;
            let ustart = i;
            while i < bytes.len() && bytes[i].is_ascii_alphabetic() {
                i += 1;
            }
            let unit = match &s[ustart..i] {
                "ms" => 1,
                "s" => 1000,
                "m" => 60_000,
                "h" => 3_600_000,
                "d" => Self::DAY,
                "w" => 7 * Self::DAY,
                _ => return Err(err()),
            };
            total = n.checked_mul(unit).and_then(|v| total.checked_add(v)).ok_or_else(err)?;
        }
        Ok(Period(total))
    }
}

impl fmt::Display for Period {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let ms = self.0;
        if ms == 0 {
            return write!(f, "0");
        }
        for (unit, size) in [("w", 7 * Self::DAY), ("d", Self::DAY), ("h", 3_600_000), ("m", 60_000), ("s", 1000)] {
            if ms % size == 0 {
                return write!(f, "{}{}", ms / size, unit);
            }
        }
        write!(f, "{}ms", ms)
    }
}

impl std::str::FromStr for Period {
    type Err = PeriodError;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        Period::parse(s)
    }
}

impl serde::Serialize for Period {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_str(self)
    }
}

impl<'de> serde::Deserialize<'de> for Period {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        let s = String::deserialize(d)?;
        Period::parse(&s).map_err(serde::de::Error::custom)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_units() {
        assert_eq!(Period::parse("30d").unwrap().ms(), 30 * 86_400_000);
        assert_eq!(Period::parse("12h").unwrap().ms(), 12 * 3_600_000);
        assert_eq!(Period::parse("90m").unwrap().ms(), 90 * 60_000);
        assert_eq!(Period::parse("5s").unwrap().ms(), 5000);
        assert_eq!(Period::parse("250ms").unwrap().ms(), 250);
        assert_eq!(Period::parse("1d12h").unwrap().ms(), 36 * 3_600_000);
        assert_eq!(Period::parse("0").unwrap().ms(), 0);
        for bad in ["", "d", "30", "30x", "-1d", "1.5d", "99999999999999999d"] {
            assert!(Period::parse(bad).is_err(), "{bad}");
        }
    }

    #[test]
    fn display_round_trips() {
        for s in ["30d", "12h", "90m", "5s", "250ms", "2w", "0"] {
            assert_eq!(Period::parse(s).unwrap().to_string(), s);
        }
    }
}
