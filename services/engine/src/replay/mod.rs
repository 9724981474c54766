//! Replay: applying a whole input in path order (docs/contract.md, "Journey
//! rules": in `replay` the watermark is the time of the event being applied).
//!
//! - [`Replayer`]: the loop over events already deduplicated and sorted:
//!   move the watermark to each event's time (closing whatever expired
//!   before it), apply the event, and at the end close every journey.
//! - [`dedupe`]: the duplicate rule (first occurrence in input order wins).
//! - [`two_pass`]: the driver (fit the data-driven models, then credit).
//! - [`replay_lines`]: all of it in memory over NDJSON lines (tests, the
//!   load tools); `apportion replay` runs the same driver over a file.

pub mod dedupe;
pub mod two_pass;

use apportion_contract::{parse_event, CreditRow, Event, EventKind, PathRow, Rejection};

use crate::credit::{credit_rows, path_row};
use crate::journey::{Outcome, Rules};
use crate::model::Model;
use crate::processor::{Effect, JourneyEvent, JourneyStore, MemStore, Processor};
use crate::pseudonym::Pseudonymizer;
use crate::registry::ModelPlan;

pub use dedupe::{dedupe_digest, erase_digest, event_digest, event_id_digest, FirstSeen};
pub use two_pass::{Pass, Replayed};

/// The replay loop over events in path order (already deduplicated).
pub struct Replayer<S: JourneyStore> {
    processor: Processor,
    store: S,
    watermark: i64,
}

impl<S: JourneyStore> Replayer<S> {
    /// A replayer over `store`.
    pub fn new(rules: Rules, store: S) -> Self {
        Replayer { processor: Processor::new(rules), store, watermark: i64::MIN }
    }

    /// The store (e.g. to flush it).
    pub fn store_mut(&mut self) -> &mut S {
        &mut self.store
    }

    /// Applies one event; events must come in path order.
    pub fn push(&mut self, event: JourneyEvent) -> Result<Vec<Effect>, S::Error> {
        let ts = event.ts();
        debug_assert!(ts >= self.watermark, "replay input must be sorted by time");
        self.watermark = self.watermark.max(ts);
        let mut effects = self.processor.advance(&mut self.store, self.watermark)?;
        effects.extend(self.processor.apply(&mut self.store, event, self.watermark)?);
        Ok(effects)
    }

    /// End of input: closes everything.
    pub fn finish(&mut self) -> Result<Vec<Effect>, S::Error> {
        self.processor.finish(&mut self.store)
    }
}

/// Rows produced by one effect.
pub fn effect_rows(effect: &Effect, models: &[Box<dyn Model>]) -> (Vec<CreditRow>, Option<PathRow>) {
    match effect {
        Effect::Journey { user_key, outcome: Outcome::Converted { conversion, path } } => {
            let rows = models.iter().flat_map(|m| credit_rows(user_key, conversion, path, m.as_ref())).collect();
            let p = (!path.is_empty()).then(|| path_row(user_key, Some(conversion), path));
            (rows, p)
        }
        Effect::Journey { user_key, outcome: Outcome::Expired { path } } => {
            (Vec::new(), Some(path_row(user_key, None, path)))
        }
        Effect::Erased { .. } | Effect::TouchesDropped { .. } => (Vec::new(), None),
    }
}

/// Result of [`replay_lines`].
#[derive(Debug, Default, Clone)]
pub struct ReplayResult {
    /// Credit rows in output order.
    pub rows: Vec<CreditRow>,
    /// Closed paths in output order.
    pub paths: Vec<PathRow>,
    /// Rejected lines: 1-based line number and reason.
    pub rejected: Vec<(u64, Rejection)>,
    /// Duplicate events dropped.
    pub duplicates: u64,
}

/// Valid events of NDJSON lines (blank lines skipped), duplicates dropped
/// (first occurrence in input order wins), sorted in path order: by time,
/// then line number.
pub struct SortedEvents {
    /// (line number, event).
    pub events: Vec<(u64, Event)>,
    /// Rejected lines.
    pub rejected: Vec<(u64, Rejection)>,
    /// Duplicates dropped.
    pub duplicates: u64,
    /// Valid events dropped unread: `consent.measurement` false.
    pub without_consent: u64,
}

/// Parses, deduplicates and sorts `lines` (see [`SortedEvents`]).
pub fn sorted_events(lines: &[&str]) -> SortedEvents {
    let mut out = SortedEvents { events: Vec::new(), rejected: Vec::new(), duplicates: 0, without_consent: 0 };
    let mut seen = FirstSeen::with_capacity(lines.len());
    for (i, line) in lines.iter().enumerate() {
        let n = i as u64 + 1;
        if line.trim().is_empty() {
            continue;
        }
        match parse_event(line.as_bytes()) {
            Ok(ev) if ev.without_consent() => out.without_consent += 1,
            Ok(ev) if seen.first(&ev) => out.events.push((n, ev)),
            Ok(_) => out.duplicates += 1,
            Err(r) => out.rejected.push((n, r)),
        }
    }
    out.events.sort_by_key(|(n, ev)| (ev.timestamp_ms, *n));
    out
}

/// The journey form of a validated event: the raw user id is turned into
/// its key and goes no further.
pub fn journey_event(ev: &Event, pseudonymizer: &Pseudonymizer, seq: u64) -> JourneyEvent {
    let key = pseudonymizer.key_of(ev);
    let mut ev = ev.clone();
    ev.user_id.clear();
    if ev.kind == EventKind::Erase {
        ev.event_id.clear();
    }
    JourneyEvent::from_event(ev, key, seq)
}

/// Replays NDJSON lines in memory with the models of `plan` (fitting the
/// data-driven ones on a first pass over the same lines).
pub fn replay_lines(lines: &[&str], rules: Rules, pseudonymizer: &Pseudonymizer, plan: &ModelPlan) -> ReplayResult {
    let sorted = sorted_events(lines);
    let mut out = ReplayResult { rejected: sorted.rejected, duplicates: sorted.duplicates, ..Default::default() };
    let events = &sorted.events;
    two_pass::run::<_, std::convert::Infallible, _, _, _>(
        plan,
        rules,
        |_| Ok(MemStore::default()),
        |_, apply| {
            for (n, ev) in events {
                apply(journey_event(ev, pseudonymizer, *n))?;
            }
            Ok(())
        },
        |effect, models| {
            let (rows, path) = effect_rows(effect, models);
            out.rows.extend(rows);
            out.paths.extend(path);
            Ok(())
        },
    )
    .unwrap_or_else(|e| match e {});
    out
}
