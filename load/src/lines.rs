//! Writing input events (docs/contract.md, "Input events") as NDJSON lines.
//!
//! The generators write millions of lines, so this formats straight into the
//! output buffer: no `serde_json` value, no string per event. Names are
//! checked to need no JSON escaping when the scenario is validated.

use std::io::{self, Write};

use crate::timefmt::rfc3339_ms;

/// How a timestamp is written (the contract accepts both).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TimeForm {
    /// `"2026-03-01T10:00:00.000Z"`.
    Rfc3339,
    /// Integer epoch milliseconds.
    EpochMs,
}

/// Writes event lines to `W` (wrap files in a `BufWriter`).
pub struct LineWriter<W: Write> {
    w: W,
    buf: [u8; 24],
    lines: u64,
}

impl<W: Write> LineWriter<W> {
    /// A writer over `w`.
    pub fn new(w: W) -> Self {
        LineWriter { w, buf: [0; 24], lines: 0 }
    }

    /// Lines written so far.
    pub fn lines(&self) -> u64 {
        self.lines
    }

    /// The inner writer.
    pub fn into_inner(self) -> W {
        self.w
    }

    fn timestamp(&mut self, ts: i64, form: TimeForm) -> io::Result<()> {
        match form {
            TimeForm::Rfc3339 => {
                self.w.write_all(b"\"timestamp\":\"")?;
                let s = rfc3339_ms(ts, &mut self.buf);
                self.w.write_all(s.as_bytes())?;
                self.w.write_all(b"\"")
            }
            TimeForm::EpochMs => write!(self.w, "\"timestamp\":{ts}"),
        }
    }

    /// A touch event.
    #[allow(clippy::too_many_arguments)]
    pub fn touch(
        &mut self,
        event_id: (&str, u64),
        user_id: (&str, u64),
        ts: i64,
        form: TimeForm,
        channel: &str,
        campaign: &str,
        view: bool,
    ) -> io::Result<()> {
        write!(
            self.w,
            "{{\"type\":\"touch\",\"event_id\":\"{}{}\",\"user_id\":\"{}{}\",",
            event_id.0, event_id.1, user_id.0, user_id.1
        )?;
        self.timestamp(ts, form)?;
        writeln!(
            self.w,
            ",\"channel\":\"{channel}\",\"campaign\":\"{campaign}\",\"interaction\":\"{}\"}}",
            if view { "view" } else { "click" }
        )?;
        self.lines += 1;
        Ok(())
    }

    /// A conversion event with a value in cents.
    #[allow(clippy::too_many_arguments)]
    pub fn conversion(
        &mut self,
        event_id: (&str, u64),
        user_id: (&str, u64),
        ts: i64,
        form: TimeForm,
        goal: &str,
        value_cents: u64,
        currency: &str,
    ) -> io::Result<()> {
        write!(
            self.w,
            "{{\"type\":\"conversion\",\"event_id\":\"{}{}\",\"user_id\":\"{}{}\",",
            event_id.0, event_id.1, user_id.0, user_id.1
        )?;
        self.timestamp(ts, form)?;
        writeln!(
            self.w,
            ",\"goal\":\"{goal}\",\"value\":{}.{:02},\"currency\":\"{currency}\"}}",
            value_cents / 100,
            value_cents % 100
        )?;
        self.lines += 1;
        Ok(())
    }

    /// Flushes the inner writer.
    pub fn flush(&mut self) -> io::Result<()> {
        self.w.flush()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use apportion_engine::contract::{parse_event, EventKind, Interaction};

    #[test]
    fn lines_parse_under_the_input_contract() {
        // The engine's own parser is the reference for the contract.
        let mut w = LineWriter::new(Vec::new());
        w.touch(("e-", 1), ("sim-user-", 7), 1_772_323_200_123, TimeForm::Rfc3339, "email", "trail-club", false)
            .unwrap();
        w.touch(("e-", 2), ("sim-user-", 7), 1_772_323_200_456, TimeForm::EpochMs, "display", "new-arrivals", true)
            .unwrap();
        w.conversion(("e-", 3), ("sim-user-", 7), 1_772_323_300_000, TimeForm::Rfc3339, "purchase", 12_305, "USD")
            .unwrap();
        assert_eq!(w.lines(), 3);
        let text = String::from_utf8(w.into_inner()).unwrap();
        let evs: Vec<_> = text.lines().map(|l| parse_event(l.as_bytes()).unwrap()).collect();
        assert_eq!(evs[0].kind, EventKind::Touch);
        assert_eq!(evs[0].event_id, "e-1");
        assert_eq!(evs[0].user_id, "sim-user-7");
        assert_eq!(evs[0].timestamp_ms, 1_772_323_200_123);
        assert_eq!(evs[0].channel, "email");
        assert_eq!(evs[0].campaign.as_deref(), Some("trail-club"));
        assert_eq!(evs[0].interaction, Interaction::Click);
        assert_eq!(evs[1].timestamp_ms, 1_772_323_200_456);
        assert_eq!(evs[1].interaction, Interaction::View);
        assert_eq!(evs[2].kind, EventKind::Conversion);
        assert_eq!(evs[2].goal, "purchase");
        assert_eq!(evs[2].value, Some(123.05));
        assert_eq!(evs[2].currency.as_deref(), Some("USD"));
    }
}
