//! Applying events to journeys held in a [`JourneyStore`].
//!
//! [`Processor`] is the whole journey pipeline minus IO: it loads a user's
//! journey from the store, applies the event, advances it to the watermark
//! and saves it back with its next wake-up time. The store keeps a wake
//! index ordered by time, so [`Processor::advance`] only visits journeys that
//! have something due and never scans all users.
//!
//! The same processor serves `replay` (watermark = time of each event) and
//! `serve` (watermark = max event time on the partition - allowed lateness);
//! [`MemStore`] is the in-memory store used by tests and small runs, and the
//! sled-backed store lives in the `apportion-store` crate.

use std::collections::{BTreeMap, BTreeSet};

use foldhash::HashMap;

use crate::journey::{Conversion, Dropped, Journey, Outcome, Rules, Touch};
use apportion_contract::{Event, EventKind, UserKey};

/// Persistent (or in-memory) journey state with a wake index.
pub trait JourneyStore {
    /// Error of the backing store.
    type Error: std::error::Error + Send + Sync + 'static;

    /// The user's journey, if one is open.
    fn load(&mut self, key: &UserKey) -> Result<Option<Journey>, Self::Error>;
    /// The user's journey, moved out of the store to be changed and handed
    /// back with [`JourneyStore::save`]. Until then the store's copy is
    /// unspecified, so every `take` must be followed by a `save` of the key
    /// (or the store dropped). Stores that keep journeys decoded in memory
    /// override it to avoid a copy; the default is [`JourneyStore::load`].
    fn take(&mut self, key: &UserKey) -> Result<Option<Journey>, Self::Error> {
        self.load(key)
    }
    /// Stores the journey and its next wake-up time (`Journey::next_wake`);
    /// an empty journey is removed.
    fn save(&mut self, key: &UserKey, journey: Journey, wake: Option<i64>) -> Result<(), Self::Error>;
    /// Keys whose wake time is at or before `watermark`, ordered by (wake, key).
    fn due(&mut self, watermark: i64) -> Result<Vec<UserKey>, Self::Error>;
    /// Every key with an open journey, in key order.
    fn keys(&mut self) -> Result<Vec<UserKey>, Self::Error>;
}

/// An event ready for the journey rules: validated and pseudonymized.
#[derive(Debug, Clone, PartialEq)]
pub struct JourneyEvent {
    /// Pseudonymous user key.
    pub user_key: UserKey,
    /// Arrival sequence (input line or partition offset).
    pub seq: u64,
    /// The event, with `user_id` already cleared.
    pub kind: JourneyEventKind,
}

/// The part of an event the journey rules need.
#[derive(Debug, Clone, PartialEq)]
pub enum JourneyEventKind {
    /// A touch.
    Touch(Touch),
    /// A conversion.
    Conversion(Conversion),
    /// Forget the user.
    Erase {
        /// Event time.
        ts: i64,
    },
}

impl JourneyEvent {
    /// Builds the keyed form of a validated event. The raw `user_id` is not
    /// carried over.
    pub fn from_event(ev: Event, user_key: UserKey, seq: u64) -> Self {
        let kind = match ev.kind {
            EventKind::Touch => JourneyEventKind::Touch(Touch {
                event_id: ev.event_id,
                ts: ev.timestamp_ms,
                seq,
                channel: ev.channel,
                campaign: ev.campaign,
                interaction: ev.interaction,
            }),
            EventKind::Conversion => JourneyEventKind::Conversion(Conversion {
                event_id: ev.event_id,
                ts: ev.timestamp_ms,
                seq,
                goal: ev.goal,
                value: ev.value,
                currency: ev.currency,
            }),
            EventKind::Erase => JourneyEventKind::Erase { ts: ev.timestamp_ms },
        };
        JourneyEvent { user_key, seq, kind }
    }

    /// Event time.
    pub fn ts(&self) -> i64 {
        match &self.kind {
            JourneyEventKind::Touch(t) => t.ts,
            JourneyEventKind::Conversion(c) => c.ts,
            JourneyEventKind::Erase { ts } => *ts,
        }
    }
}

/// What the processor reports.
#[derive(Debug, Clone, PartialEq)]
pub enum Effect {
    /// A journey outcome (conversion credited or path expired) for a user.
    Journey {
        /// User.
        user_key: UserKey,
        /// What happened.
        outcome: Outcome,
    },
    /// The user's journey was erased (nothing is emitted for it).
    Erased {
        /// User.
        user_key: UserKey,
        /// Touches dropped.
        touches: usize,
        /// Event ids of the pending conversions dropped.
        conversion_ids: Vec<String>,
    },
    /// Touches dropped from the user's journey (contract: Journey rules,
    /// Touch limits).
    TouchesDropped {
        /// User.
        user_key: UserKey,
        /// Over `max_touches` (the oldest of a full run).
        cap: usize,
        /// Older than `max_age_ms` before the newest touch of their run.
        age: usize,
    },
}

/// Applies events under the journey rules.
#[derive(Debug, Clone, Copy)]
pub struct Processor {
    /// Timing rules.
    pub rules: Rules,
}

impl Processor {
    /// A processor with the given rules.
    pub fn new(rules: Rules) -> Self {
        Processor { rules }
    }

    /// Advances every journey that has something due at `watermark`.
    pub fn advance<S: JourneyStore>(&self, store: &mut S, watermark: i64) -> Result<Vec<Effect>, S::Error> {
        let mut out = Vec::new();
        for key in store.due(watermark)? {
            let Some(mut j) = store.take(&key)? else { continue };
            let outcomes = j.advance(watermark, &self.rules);
            let wake = j.next_wake(&self.rules);
            store.save(&key, j, wake)?;
            out.extend(outcomes.into_iter().map(|outcome| Effect::Journey { user_key: key, outcome }));
        }
        Ok(out)
    }

    /// Applies one event, then advances its journey to `watermark`.
    pub fn apply<S: JourneyStore>(
        &self,
        store: &mut S,
        event: JourneyEvent,
        watermark: i64,
    ) -> Result<Vec<Effect>, S::Error> {
        let key = event.user_key;
        let mut j = store.take(&key)?.unwrap_or_default();
        let mut dropped = Dropped::default();
        match event.kind {
            JourneyEventKind::Touch(t) => dropped = j.add_touch_capped(t, &self.rules),
            JourneyEventKind::Conversion(c) => j.add_conversion(c),
            JourneyEventKind::Erase { .. } => {
                let effect = Effect::Erased {
                    user_key: key,
                    touches: j.touches.len(),
                    conversion_ids: j.pending.into_iter().map(|c| c.event_id).collect(),
                };
                store.save(&key, Journey::default(), None)?;
                return Ok(vec![effect]);
            }
        }
        let outcomes = j.advance(watermark, &self.rules);
        let wake = j.next_wake(&self.rules);
        store.save(&key, j, wake)?;
        let mut effects: Vec<Effect> = Vec::with_capacity(outcomes.len() + 1);
        if dropped != Dropped::default() {
            effects.push(Effect::TouchesDropped { user_key: key, cap: dropped.cap, age: dropped.age });
        }
        effects.extend(outcomes.into_iter().map(|outcome| Effect::Journey { user_key: key, outcome }));
        Ok(effects)
    }

    /// End of input: credits every pending conversion and closes every open
    /// journey as non-converting, in key order.
    pub fn finish<S: JourneyStore>(&self, store: &mut S) -> Result<Vec<Effect>, S::Error> {
        let mut out = Vec::new();
        for key in store.keys()? {
            let Some(mut j) = store.take(&key)? else { continue };
            let outcomes = j.finish(&self.rules);
            store.save(&key, Journey::default(), None)?;
            out.extend(outcomes.into_iter().map(|outcome| Effect::Journey { user_key: key, outcome }));
        }
        Ok(out)
    }
}

/// An in-memory [`JourneyStore`] (tests, demos, small inputs).
#[derive(Debug, Default, Clone)]
pub struct MemStore {
    journeys: HashMap<UserKey, (Journey, Option<i64>)>,
    wake: BTreeSet<(i64, UserKey)>,
}

impl MemStore {
    /// Number of open journeys.
    pub fn len(&self) -> usize {
        self.journeys.len()
    }

    /// True when no journey is open.
    pub fn is_empty(&self) -> bool {
        self.journeys.is_empty()
    }
}

impl JourneyStore for MemStore {
    type Error = std::convert::Infallible;

    fn load(&mut self, key: &UserKey) -> Result<Option<Journey>, Self::Error> {
        Ok(self.journeys.get(key).map(|(j, _)| j.clone()))
    }

    fn take(&mut self, key: &UserKey) -> Result<Option<Journey>, Self::Error> {
        // The wake time stays, so `save` can still find the old index entry.
        Ok(self.journeys.get_mut(key).map(|(j, _)| std::mem::take(j)))
    }

    fn save(&mut self, key: &UserKey, journey: Journey, wake: Option<i64>) -> Result<(), Self::Error> {
        if let Some((_, Some(old))) = self.journeys.get(key) {
            self.wake.remove(&(*old, *key));
        }
        if journey.is_empty() {
            self.journeys.remove(key);
            return Ok(());
        }
        if let Some(w) = wake {
            self.wake.insert((w, *key));
        }
        self.journeys.insert(*key, (journey, wake));
        Ok(())
    }

    fn due(&mut self, watermark: i64) -> Result<Vec<UserKey>, Self::Error> {
        Ok(self.wake.range(..=(watermark, UserKey([0xff; 32]))).map(|(_, k)| *k).collect())
    }

    fn keys(&mut self) -> Result<Vec<UserKey>, Self::Error> {
        let ordered: BTreeMap<_, _> = self.journeys.keys().map(|k| (*k, ())).collect();
        Ok(ordered.into_keys().collect())
    }
}

impl<S: JourneyStore> JourneyStore for &mut S {
    type Error = S::Error;

    fn load(&mut self, key: &UserKey) -> Result<Option<Journey>, Self::Error> {
        (**self).load(key)
    }
    fn take(&mut self, key: &UserKey) -> Result<Option<Journey>, Self::Error> {
        (**self).take(key)
    }
    fn save(&mut self, key: &UserKey, journey: Journey, wake: Option<i64>) -> Result<(), Self::Error> {
        (**self).save(key, journey, wake)
    }
    fn due(&mut self, watermark: i64) -> Result<Vec<UserKey>, Self::Error> {
        (**self).due(watermark)
    }
    fn keys(&mut self) -> Result<Vec<UserKey>, Self::Error> {
        (**self).keys()
    }
}
