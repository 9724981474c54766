//! Replay: applying a whole input in event-time order.
//!
//! [`Replayer`] is the replay loop without IO: it drops duplicate event ids,
//! moves the watermark to each event's time (closing whatever expired before
//! it), applies the event and, at the end, closes every open journey. The
//! binary feeds it events it sorted from a file, with a sled-backed store;
//! tests feed it in-memory lines with [`MemStore`](crate::MemStore) through
//! [`replay_lines`].

use std::collections::HashSet;

use sha2::{Digest, Sha256};

use crate::credit::{credit_rows, path_row, CreditRow, PathRow};
use crate::event::{parse_event, Event, EventKind, Rejection};
use crate::journey::{Outcome, Rules};
use crate::model::Model;
use crate::processor::{Effect, JourneyStore, KeyedEvent, Processor};
use crate::pseudonym::Pseudonymizer;

/// What happened to one pushed event.
#[derive(Debug, Clone, PartialEq)]
pub enum Pushed {
    /// The event id was seen before; the event was dropped.
    Duplicate,
    /// The event was applied; these effects followed.
    Applied(Vec<Effect>),
}

/// The replay loop over events already in event-time order.
pub struct Replayer<S: JourneyStore> {
    processor: Processor,
    store: S,
    seen: HashSet<u128>,
    watermark: i64,
}

/// 128-bit digest of an event id, for duplicate detection.
pub fn event_id_digest(event_id: &str) -> u128 {
    let d = Sha256::digest(event_id.as_bytes());
    u128::from_be_bytes(d[..16].try_into().expect("16 bytes"))
}

impl<S: JourneyStore> Replayer<S> {
    /// A replayer over `store`.
    pub fn new(rules: Rules, store: S) -> Self {
        Replayer { processor: Processor::new(rules), store, seen: HashSet::new(), watermark: i64::MIN }
    }

    /// The store (e.g. to flush it).
    pub fn store_mut(&mut self) -> &mut S {
        &mut self.store
    }

    /// Applies one keyed event. Events must come in (time, arrival) order.
    pub fn push(&mut self, event: KeyedEvent, event_id: &str) -> Result<Pushed, S::Error> {
        if !event_id.is_empty() && !matches!(event.kind, crate::processor::KeyedKind::Erase { .. }) {
            if !self.seen.insert(event_id_digest(event_id)) {
                return Ok(Pushed::Duplicate);
            }
        }
        let ts = event.ts();
        debug_assert!(ts >= self.watermark, "replay input must be sorted by time");
        self.watermark = self.watermark.max(ts);
        let mut effects = self.processor.advance(&mut self.store, self.watermark)?;
        effects.extend(self.processor.apply(&mut self.store, event, self.watermark)?);
        Ok(Pushed::Applied(effects))
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
        Effect::Erased { .. } => (Vec::new(), None),
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

/// Parses lines and sorts the valid events by (time, line number).
pub fn sorted_events(lines: &[&str]) -> (Vec<(u64, Event)>, Vec<(u64, Rejection)>) {
    let mut events = Vec::new();
    let mut rejected = Vec::new();
    for (i, line) in lines.iter().enumerate() {
        let n = i as u64 + 1;
        if line.trim().is_empty() {
            continue;
        }
        match parse_event(line.as_bytes()) {
            Ok(ev) => events.push((n, ev)),
            Err(r) => rejected.push((n, r)),
        }
    }
    events.sort_by_key(|(n, ev)| (ev.timestamp_ms, *n));
    (events, rejected)
}

/// Replays NDJSON lines in memory. `models` is called with the closed paths
/// of a first pass when `two_pass` is set (data-driven models fit on them),
/// otherwise with an empty slice.
pub fn replay_lines<F>(
    lines: &[&str],
    rules: Rules,
    pseudonymizer: &Pseudonymizer,
    two_pass: bool,
    models: F,
) -> ReplayResult
where
    F: FnOnce(&[PathRow]) -> Vec<Box<dyn Model>>,
{
    let (events, rejected) = sorted_events(lines);
    let run = |models: &[Box<dyn Model>]| {
        let mut r = Replayer::new(rules, crate::processor::MemStore::default());
        let mut out = ReplayResult::default();
        let take = |effects: Vec<Effect>, out: &mut ReplayResult| {
            for e in &effects {
                let (rows, path) = effect_rows(e, models);
                out.rows.extend(rows);
                out.paths.extend(path);
            }
        };
        for (n, ev) in &events {
            let key = pseudonymizer.key_for(&ev.user_id);
            let id = if ev.kind == EventKind::Erase { String::new() } else { ev.event_id.clone() };
            let mut ev = ev.clone();
            ev.user_id.clear();
            match r.push(KeyedEvent::from_event(ev, key, *n), &id).expect("in-memory store") {
                Pushed::Duplicate => out.duplicates += 1,
                Pushed::Applied(effects) => take(effects, &mut out),
            }
        }
        let effects = r.finish().expect("in-memory store");
        take(effects, &mut out);
        out
    };
    let models = if two_pass {
        let first = run(&[]);
        models(&first.paths)
    } else {
        models(&[])
    };
    let mut out = run(&models);
    out.rejected = rejected;
    out
}
