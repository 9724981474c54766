//! Lift tests: what controlled experiments measured, beside what each model
//! credits.
//!
//! A lift test (a holdout, a geo test) measures how many conversions a
//! channel added in a period: its incremental conversions, with a
//! standard error or an interval. Credit is correlational; an experiment
//! is the practitioner's check on it. The report puts each model's
//! credited conversions for the tested channel and period beside the
//! measurement and marks the models whose credit falls outside the
//! experiment's interval. Nothing is adjusted: no model is calibrated to
//! the experiment, the user decides what to make of the comparison.
//!
//! ## The experiments file
//!
//! CSV (RFC 4180: fields with commas or quotes are double-quoted, a quote
//! inside is doubled), UTF-8, one experiment per line after a header line.
//! Lines starting with `#` and blank lines are skipped. Columns, in any
//! order:
//!
//! | column | meaning |
//! | --- | --- |
//! | `channel` | the tested channel, as in the credit rows |
//! | `start` | first instant of the period: RFC 3339 (`2026-03-01T00:00:00Z`) or an ISO 8601 date (`2026-03-01`, meaning its 00:00 UTC) |
//! | `end` | end of the period, exclusive: RFC 3339, or a date, which includes that whole day (UTC) |
//! | `incremental_conversions` | the measured lift: conversions the channel added in the period |
//! | `std_error` | its standard error; the interval is then `incremental_conversions ± 1.645 × std_error` (90 %, two-sided, normal) |
//! | `low`, `high` | or the interval itself, at whatever level the test reported |
//! | `source` | where the number comes from (test name, team, document) |
//!
//! Each line gives either `std_error` or both `low` and `high` (the other
//! columns may be absent or empty). Example:
//!
//! ```text
//! channel,start,end,incremental_conversions,std_error,low,high,source
//! email,2026-03-01,2026-03-31,140,25,,,spring holdout (10 % of the list kept out)
//! paid_search,2026-03-01,2026-03-31,310,,220,400,"geo test, 12 regions"
//! ```
//!
//! Credited conversions are compared for conversions whose time lies in
//! `[start, end)`; a conversion counts in the period whatever the time of
//! the touches credited.

use std::path::Path;

use apportion_engine::contract::time::{format_ms, parse_rfc3339_ms};
use serde::{Deserialize, Serialize};

use crate::ReportError;

/// The 95th percentile of the standard normal distribution: a two-sided
/// 90 % interval is `estimate ± Z90 × std_error` (from memory; found in any
/// table of the normal distribution).
pub const Z90: f64 = 1.644_853_626_951_472_2;

const DAY_MS: i64 = 86_400_000;

/// One experiment of the experiments file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Experiment {
    /// The tested channel.
    pub channel: String,
    /// Start of the period, epoch ms (inclusive).
    pub start_ms: i64,
    /// End of the period, epoch ms (exclusive).
    pub end_ms: i64,
    /// Measured incremental conversions.
    pub incremental_conversions: f64,
    /// Its standard error, when the file gave one.
    pub std_error: Option<f64>,
    /// Low end of the interval.
    pub low: f64,
    /// High end of the interval.
    pub high: f64,
    /// Where the measurement comes from.
    pub source: String,
    /// Line of the experiments file.
    pub line: u64,
}

/// Splits one CSV line into fields (RFC 4180 quoting).
fn split_csv(line: &str) -> Result<Vec<String>, String> {
    let mut fields = Vec::new();
    let mut cur = String::new();
    let mut chars = line.chars().peekable();
    let mut quoted = false;
    let mut was_quoted = false;
    while let Some(c) = chars.next() {
        if quoted {
            if c == '"' {
                if chars.peek() == Some(&'"') {
                    cur.push('"');
                    chars.next();
                } else {
                    quoted = false;
                }
            } else {
                cur.push(c);
            }
        } else if c == '"' {
            if !cur.trim().is_empty() {
                return Err("a quote inside an unquoted field (quote the whole field)".into());
            }
            cur.clear();
            quoted = true;
            was_quoted = true;
        } else if c == ',' {
            fields.push(if was_quoted {
                std::mem::take(&mut cur)
            } else {
                std::mem::take(&mut cur).trim().to_string()
            });
            was_quoted = false;
        } else if was_quoted {
            if !c.is_whitespace() {
                return Err("text after a closing quote".into());
            }
        } else {
            cur.push(c);
        }
    }
    if quoted {
        return Err("a quoted field is not closed".into());
    }
    fields.push(if was_quoted { cur } else { cur.trim().to_string() });
    Ok(fields)
}

/// A date (`YYYY-MM-DD`) or an RFC 3339 time; a date's instant is its
/// 00:00 UTC, or the next day's when `end` (the whole day included).
fn parse_instant(s: &str, end: bool) -> Option<i64> {
    let b = s.as_bytes();
    let is_date = b.len() == 10 && b[4] == b'-' && b[7] == b'-';
    if is_date {
        let ms = parse_rfc3339_ms(&format!("{s}T00:00:00Z"))?;
        return Some(if end { ms + DAY_MS } else { ms });
    }
    parse_rfc3339_ms(s)
}

const COLUMNS: [&str; 8] = ["channel", "start", "end", "incremental_conversions", "std_error", "low", "high", "source"];

/// Parses an experiments file's text (see the module docs). `name` labels
/// errors.
pub fn parse_experiments(text: &str, name: &str) -> Result<Vec<Experiment>, ReportError> {
    let err = |line: u64, detail: String| ReportError::Experiment { path: name.to_string(), line, detail };
    let mut header: Option<(Vec<Option<usize>>, usize)> = None;
    let mut out = Vec::new();
    for (i, raw) in text.lines().enumerate() {
        let n = i as u64 + 1;
        let line = raw.trim_start_matches('\u{feff}').trim();
        if line.is_empty() || line.starts_with('#') {
            continue;
        }
        let fields = split_csv(line).map_err(|d| err(n, d))?;
        let Some((cols, width)) = &header else {
            let mut idx = vec![None; COLUMNS.len()];
            for (k, f) in fields.iter().enumerate() {
                let f = f.to_ascii_lowercase();
                match COLUMNS.iter().position(|c| *c == f) {
                    Some(c) if idx[c].is_some() => return Err(err(n, format!("column {f:?} appears twice"))),
                    Some(c) => idx[c] = Some(k),
                    None => {
                        return Err(err(
                            n,
                            format!("unknown column {f:?} in the header; the columns are {}", COLUMNS.join(", ")),
                        ))
                    }
                }
            }
            for required in ["channel", "start", "end", "incremental_conversions", "source"] {
                if idx[COLUMNS.iter().position(|c| *c == required).expect("listed")].is_none() {
                    return Err(err(n, format!("the header has no {required:?} column")));
                }
            }
            let has = |c: &str| idx[COLUMNS.iter().position(|x| *x == c).expect("listed")].is_some();
            let interval_columns = has("std_error") || (has("low") && has("high"));
            if !interval_columns {
                return Err(err(n, "the header needs a \"std_error\" column or both \"low\" and \"high\"".into()));
            }
            header = Some((idx, fields.len()));
            continue;
        };
        if fields.len() > *width {
            return Err(err(n, format!("{} fields, but the header has {width} columns", fields.len())));
        }
        let get = |c: &str| -> &str {
            cols[COLUMNS.iter().position(|x| *x == c).expect("listed")]
                .and_then(|k| fields.get(k))
                .map_or("", |s| s.as_str())
        };
        let number = |c: &str| -> Result<Option<f64>, ReportError> {
            let s = get(c);
            if s.is_empty() {
                return Ok(None);
            }
            match s.parse::<f64>() {
                Ok(v) if v.is_finite() => Ok(Some(v)),
                _ => Err(err(n, format!("{c} is not a finite number: {s:?}"))),
            }
        };
        let channel = get("channel").to_string();
        if channel.is_empty() {
            return Err(err(n, "channel is empty".into()));
        }
        let instant = |c: &str, end: bool| -> Result<i64, ReportError> {
            let s = get(c);
            parse_instant(s, end)
                .ok_or_else(|| err(n, format!("{c} is not an ISO 8601 date (YYYY-MM-DD) or an RFC 3339 time: {s:?}")))
        };
        let start_ms = instant("start", false)?;
        let end_ms = instant("end", true)?;
        if end_ms <= start_ms {
            return Err(err(n, format!("end ({}) is not after start ({})", format_ms(end_ms), format_ms(start_ms))));
        }
        let estimate =
            number("incremental_conversions")?.ok_or_else(|| err(n, "incremental_conversions is empty".into()))?;
        let se = number("std_error")?;
        let (low, high) = (number("low")?, number("high")?);
        let (low, high) = match (se, low, high) {
            (Some(_), Some(_), _) | (Some(_), _, Some(_)) => {
                return Err(err(n, "give std_error or low and high, not both".into()));
            }
            (Some(se), None, None) => {
                if se <= 0.0 {
                    return Err(err(n, format!("std_error must be > 0, got {se}")));
                }
                (estimate - Z90 * se, estimate + Z90 * se)
            }
            (None, Some(l), Some(h)) => {
                if l > h {
                    return Err(err(n, format!("low ({l}) is above high ({h})")));
                }
                if estimate < l || estimate > h {
                    return Err(err(n, format!("incremental_conversions ({estimate}) is outside [low, high]")));
                }
                (l, h)
            }
            (None, _, _) => return Err(err(n, "give std_error, or both low and high".into())),
        };
        let source = get("source").to_string();
        if source.is_empty() {
            return Err(err(n, "source is empty: say where the measurement comes from".into()));
        }
        out.push(Experiment {
            channel,
            start_ms,
            end_ms,
            incremental_conversions: estimate,
            std_error: se,
            low,
            high,
            source,
            line: n,
        });
    }
    if header.is_none() {
        return Err(err(1, "the file has no header line".into()));
    }
    Ok(out)
}

/// Reads and parses an experiments file.
pub fn read_experiments(path: &Path) -> Result<Vec<Experiment>, ReportError> {
    let text =
        std::fs::read_to_string(path).map_err(|error| ReportError::Io { path: path.display().to_string(), error })?;
    parse_experiments(&text, &path.display().to_string())
}

/// Where a model's credit lies against an experiment's interval.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Side {
    /// Below `low`.
    Below,
    /// Within `[low, high]`.
    Inside,
    /// Above `high`.
    Above,
}

/// Where `x` lies against `[low, high]`.
pub fn side(x: f64, low: f64, high: f64) -> Side {
    if x < low {
        Side::Below
    } else if x > high {
        Side::Above
    } else {
        Side::Inside
    }
}

/// One model's credit beside an experiment.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LiftModel {
    /// Model name.
    pub model: String,
    /// Conversions the model credits to the channel in the period.
    pub credited: f64,
    /// True when `credited` is outside `[low, high]`.
    pub outside: bool,
    /// Below, inside or above the interval.
    pub side: Side,
}

/// One experiment and every model's credit for it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LiftCheck {
    /// The tested channel.
    pub channel: String,
    /// Start of the period (RFC 3339, inclusive).
    pub start: String,
    /// End of the period (RFC 3339, exclusive).
    pub end: String,
    /// Measured incremental conversions.
    pub measured: f64,
    /// Standard error, when given.
    pub std_error: Option<f64>,
    /// Low end of the interval.
    pub low: f64,
    /// High end of the interval.
    pub high: f64,
    /// How the interval was obtained.
    pub interval: String,
    /// Where the measurement comes from.
    pub source: String,
    /// Line of the experiments file.
    pub line: u64,
    /// Conversions in the period (all channels).
    pub conversions_in_period: u64,
    /// Whether any credit row in the period names the channel.
    pub channel_seen: bool,
    /// One entry per model, in the report's model order.
    pub models: Vec<LiftModel>,
}

#[cfg(test)]
mod tests {
    use super::*;

    const HEADER: &str = "channel,start,end,incremental_conversions,std_error,low,high,source\n";

    #[test]
    fn parses_both_interval_forms() {
        let text = format!(
            "# lift tests\n{HEADER}email,2026-03-01,2026-03-31,140,25,,,spring holdout\n\
             paid_search,2026-03-01T00:00:00Z,2026-04-01T00:00:00Z,310,,220,400,\"geo test, 12 regions\"\n"
        );
        let e = parse_experiments(&text, "x.csv").unwrap();
        assert_eq!(e.len(), 2);
        assert_eq!(e[0].channel, "email");
        assert_eq!(format_ms(e[0].start_ms), "2026-03-01T00:00:00.000Z");
        // A date as end includes that whole day.
        assert_eq!(format_ms(e[0].end_ms), "2026-04-01T00:00:00.000Z");
        assert_eq!(e[0].end_ms, e[1].end_ms);
        // 140 ± 1.6449 × 25, derived by hand: 98.88 .. 181.12.
        assert!((e[0].low - 98.878_659_3).abs() < 1e-6 && (e[0].high - 181.121_340_7).abs() < 1e-6);
        assert_eq!((e[1].low, e[1].high, e[1].std_error), (220.0, 400.0, None));
        assert_eq!(e[1].source, "geo test, 12 regions");
        assert_eq!(e[1].line, 4);
    }

    #[test]
    fn errors_name_the_line_and_the_problem() {
        let cases = [
            ("email,2026-03-01,2026-03-31,140,,,,src\n", "give std_error, or both low and high"),
            ("email,2026-03-01,2026-03-31,140,25,100,200,src\n", "not both"),
            ("email,2026-03-31,2026-03-01,140,25,,,src\n", "end (2026-03-02T00:00:00.000Z) is not after start"),
            ("email,March,2026-03-31,140,25,,,src\n", "start is not an ISO 8601 date"),
            ("email,2026-03-01,2026-03-31,lots,25,,,src\n", "incremental_conversions is not a finite number"),
            ("email,2026-03-01,2026-03-31,140,-2,,,src\n", "std_error must be > 0"),
            ("email,2026-03-01,2026-03-31,140,,200,100,src\n", "low (200) is above high (100)"),
            ("email,2026-03-01,2026-03-31,140,,150,200,src\n", "outside [low, high]"),
            ("email,2026-03-01,2026-03-31,140,25,,,\n", "source is empty"),
            (",2026-03-01,2026-03-31,140,25,,,src\n", "channel is empty"),
            ("email,2026-03-01,2026-03-31,140,25,,,\"open\n", "not closed"),
        ];
        for (line, want) in cases {
            let text = format!("{HEADER}{line}");
            let e = parse_experiments(&text, "x.csv").unwrap_err().to_string();
            assert!(e.starts_with("x.csv: line 2: "), "{e}");
            assert!(e.contains(want), "{line:?}: {e}");
        }
        let e = parse_experiments("channel,begin\n", "x.csv").unwrap_err().to_string();
        assert!(e.contains("line 1: unknown column \"begin\""), "{e}");
        let e = parse_experiments("channel,start,end,incremental_conversions,source\n", "x.csv").unwrap_err();
        assert!(e.to_string().contains("needs a \"std_error\" column"), "{e}");
        assert!(parse_experiments("# nothing\n", "x.csv").unwrap_err().to_string().contains("no header"));
    }

    #[test]
    fn sides() {
        assert_eq!(side(1.0, 2.0, 3.0), Side::Below);
        assert_eq!(side(2.0, 2.0, 3.0), Side::Inside);
        assert_eq!(side(3.5, 2.0, 3.0), Side::Above);
    }
}
