//! The report as text: a plain table for the terminal, CSV (one number per
//! line, for spreadsheets and SQL), JSON (the reference form) or one
//! self-contained HTML page with SVG charts ([`html`]).

mod html;
mod svg;
mod text;

use crate::report::Report;

/// Output formats of `apportion compare`.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub enum Format {
    /// Aligned plain-text tables.
    #[default]
    Table,
    /// Long-form CSV: `section,model,other_model,key,other_key,metric,value`.
    Csv,
    /// The [`Report`] as pretty JSON.
    Json,
    /// One HTML file with inline SVG charts and a data table under each.
    Html,
}

impl std::str::FromStr for Format {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "table" => Ok(Format::Table),
            "csv" => Ok(Format::Csv),
            "json" => Ok(Format::Json),
            "html" => Ok(Format::Html),
            other => Err(format!("--format must be table, csv, json or html, not {other:?}")),
        }
    }
}

/// Renders the report.
pub fn render(report: &Report, format: Format) -> String {
    match format {
        Format::Table => text::table(report),
        Format::Csv => text::csv(report),
        Format::Json => json(report),
        Format::Html => html::page(report),
    }
}

/// The report as pretty JSON with a final newline.
pub fn json(report: &Report) -> String {
    let mut s = serde_json::to_string_pretty(report).expect("a report serializes");
    s.push('\n');
    s
}

/// A period `[start, end)` of RFC 3339 times for reading: dates only when
/// both fall on midnight UTC, the last day then inclusive
/// (`2026-03-01 to 2026-03-31`); else the times as given.
pub(crate) fn period(start: &str, end: &str) -> String {
    let midnight = |t: &str| t.len() >= 10 && t[10..].trim_start_matches('T').starts_with("00:00:00.000");
    match apportion_engine::contract::time::parse_rfc3339_ms(end) {
        Some(e) if midnight(start) && midnight(end) => {
            let last = apportion_engine::contract::time::date_of_ms(e - 1);
            format!("{} to {last}", &start[..10])
        }
        _ => format!("{start} to {end} (exclusive)"),
    }
}

/// `x` with `decimals` digits (`-0.00` shown as `0.00`).
pub(crate) fn num(x: f64, decimals: usize) -> String {
    let s = format!("{x:.decimals$}");
    if s.starts_with('-') && s[1..].chars().all(|c| c == '0' || c == '.') {
        s[1..].to_string()
    } else {
        s
    }
}

/// A signed number: `+1.25`, `-0.50`, `0.00`.
pub(crate) fn signed(x: f64, decimals: usize) -> String {
    let s = num(x, decimals);
    if s.starts_with('-') || s.chars().all(|c| c == '0' || c == '.') {
        s
    } else {
        format!("+{s}")
    }
}

/// A fraction as percent: `12.3%`.
pub(crate) fn pct(x: f64) -> String {
    format!("{}%", num(x * 100.0, 1))
}

/// A signed fraction as percent: `+12.3%`.
pub(crate) fn signed_pct(x: f64) -> String {
    format!("{}%", signed(x * 100.0, 1))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn number_forms() {
        assert_eq!(num(-0.001, 2), "0.00");
        assert_eq!(num(2.345, 1), "2.3");
        assert_eq!(signed(0.004, 2), "0.00");
        assert_eq!(signed(1.5, 2), "+1.50");
        assert_eq!(signed(-1.5, 2), "-1.50");
        assert_eq!(pct(0.1234), "12.3%");
        assert_eq!(signed_pct(-0.5), "-50.0%");
        assert!("pdf".parse::<Format>().is_err());
        // Derived by hand: the end is exclusive, so the last whole day is the day before.
        assert_eq!(period("2026-03-01T00:00:00.000Z", "2026-04-01T00:00:00.000Z"), "2026-03-01 to 2026-03-31");
        assert_eq!(
            period("2026-03-01T12:00:00.000Z", "2026-03-02T00:00:00.000Z"),
            "2026-03-01T12:00:00.000Z to 2026-03-02T00:00:00.000Z (exclusive)"
        );
    }
}
