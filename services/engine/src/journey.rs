//! Journey rules (docs/contract.md, "Journey rules").
//!
//! A [`Journey`] holds one pseudonymous user's open touches and the
//! conversions not yet credited, both in event-time order (ties by arrival
//! sequence). All decisions are made by [`Journey::advance`], which moves the
//! journey forward to a watermark and returns what happened as [`Outcome`]s.
//! Nothing here reads a clock: the watermark is always passed in.
//!
//! Exactness under any watermark granularity: a run of touches whose gaps
//! are all within `expiry` is a *segment*. Replay (watermark = time of each
//! event) would close a segment as soon as the watermark passes
//! `last + expiry`, and at the latest when the next touch (or conversion)
//! after a longer gap arrives. `advance` therefore walks segments and pending
//! conversions in time order and decides each exactly as replay would, so the
//! streaming service (coarse watermarks, touches ahead of the watermark) and
//! replay produce the same outcomes for the same events.

use serde::{Deserialize, Serialize};

use apportion_contract::Interaction;

/// Journey timing rules, all in milliseconds.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct Rules {
    /// Touches with `T - lookback <= t <= T` are eligible for a conversion at T.
    pub lookback_ms: i64,
    /// Lookback for view touches (at most `lookback_ms` in practice).
    pub view_lookback_ms: i64,
    /// A journey closes as non-converting when `last_touch + expiry < watermark`.
    pub expiry_ms: i64,
    /// At most this many touches in one run (the touches a path can be made
    /// of: no pending conversion and no gap longer than `expiry` between
    /// them); the oldest goes when a newer one would exceed it. 0: no cap.
    #[serde(default = "default_max_touches")]
    pub max_touches: usize,
    /// A touch is dropped once a newer touch of its run is more than this
    /// later (so with `expiry_ms`, no touch outlives `max_age_ms + expiry_ms`
    /// of event time); at least `lookback_ms`, so no eligible touch goes.
    /// 0: no limit.
    #[serde(default = "default_max_age")]
    pub max_age_ms: i64,
}

/// The default of [`Rules::max_age_ms`]: 365 days.
pub const DEFAULT_MAX_AGE_MS: i64 = 365 * 86_400_000;

fn default_max_age() -> i64 {
    DEFAULT_MAX_AGE_MS
}

/// Touches [`Journey::add_touch_capped`] dropped, by rule.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Dropped {
    /// Over [`Rules::max_touches`].
    pub cap: usize,
    /// Older than [`Rules::max_age_ms`] before the newest touch of their run.
    pub age: usize,
}

/// The default of [`Rules::max_touches`].
pub const DEFAULT_MAX_TOUCHES: usize = 1000;

fn default_max_touches() -> usize {
    DEFAULT_MAX_TOUCHES
}

impl Default for Rules {
    fn default() -> Self {
        let day = 86_400_000;
        Rules {
            lookback_ms: 30 * day,
            view_lookback_ms: 30 * day,
            expiry_ms: 30 * day,
            max_touches: DEFAULT_MAX_TOUCHES,
            max_age_ms: DEFAULT_MAX_AGE_MS,
        }
    }
}

/// One stored touch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Touch {
    /// Input `event_id`.
    pub event_id: String,
    /// Event time, epoch ms.
    pub ts: i64,
    /// Arrival sequence (input line or partition offset): breaks time ties.
    pub seq: u64,
    /// Channel.
    pub channel: String,
    /// Campaign, if any.
    pub campaign: Option<String>,
    /// Click or view.
    pub interaction: Interaction,
}

/// A conversion waiting for the watermark to pass it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Conversion {
    /// Input `event_id`.
    pub event_id: String,
    /// Event time, epoch ms.
    pub ts: i64,
    /// Arrival sequence.
    pub seq: u64,
    /// Goal name.
    pub goal: String,
    /// Conversion value.
    pub value: Option<f64>,
    /// ISO 4217 currency.
    pub currency: Option<String>,
}

/// What happened to a journey when it advanced.
#[derive(Debug, Clone, PartialEq)]
pub enum Outcome {
    /// A conversion was credited; `path` is the eligible path in time order
    /// (empty: the conversion is unattributed).
    Converted {
        /// The conversion.
        conversion: Conversion,
        /// Eligible touches, in time order.
        path: Vec<Touch>,
    },
    /// A run of touches closed without conversion (never empty).
    Expired {
        /// The journey's touches, in time order.
        path: Vec<Touch>,
    },
}

impl Outcome {
    /// The closed path this outcome makes, if any (no touch, no path).
    pub fn closed_path(&self) -> Option<(bool, &[Touch])> {
        match self {
            Outcome::Converted { path, .. } if !path.is_empty() => Some((true, path)),
            Outcome::Converted { .. } => None,
            Outcome::Expired { path } => Some((false, path)),
        }
    }
}

/// One user's open journey.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct Journey {
    /// Open touches, ordered by (ts, seq).
    pub touches: Vec<Touch>,
    /// Conversions not yet credited, ordered by (ts, seq).
    pub pending: Vec<Conversion>,
}

impl Journey {
    /// True when nothing is held.
    pub fn is_empty(&self) -> bool {
        self.touches.is_empty() && self.pending.is_empty()
    }

    /// Adds a touch in (ts, seq) order.
    pub fn add_touch(&mut self, t: Touch) {
        let at = self.touches.partition_point(|x| (x.ts, x.seq) <= (t.ts, t.seq));
        self.touches.insert(at, t);
    }

    /// Adds a touch in (ts, seq) order under the limits of `rules`: in the
    /// touch's run (see [`Rules::max_touches`]), touches more than
    /// `max_age_ms` older than the run's newest are dropped, then the oldest
    /// while the run holds more than `max_touches` (more than one when the
    /// new touch joined two runs into one). The new touch itself may
    /// be the one dropped (it arrived late and is the oldest).
    pub fn add_touch_capped(&mut self, t: Touch, rules: &Rules) -> Dropped {
        let at = self.touches.partition_point(|x| (x.ts, x.seq) <= (t.ts, t.seq));
        self.touches.insert(at, t);
        let mut dropped = Dropped::default();
        if rules.max_touches == 0 && rules.max_age_ms <= 0 {
            return dropped;
        }
        let mut start = at;
        while start > 0 && !self.run_boundary(start, rules.expiry_ms) {
            start -= 1;
        }
        let mut end = at + 1;
        while end < self.touches.len() && !self.run_boundary(end, rules.expiry_ms) {
            end += 1;
        }
        if rules.max_age_ms > 0 {
            let oldest_kept = self.touches[end - 1].ts.saturating_sub(rules.max_age_ms);
            let old = self.touches[start..end].partition_point(|x| x.ts < oldest_kept);
            self.touches.drain(start..start + old);
            end -= old;
            dropped.age = old;
        }
        // Usually one over; more when a late touch bridged the gap between
        // two runs and they became one.
        if rules.max_touches > 0 && end - start > rules.max_touches {
            let over = end - start - rules.max_touches;
            self.touches.drain(start..start + over);
            dropped.cap = over;
        }
        dropped
    }

    /// True when touches `i - 1` and `i` are in different runs: a gap longer
    /// than `expiry` or a pending conversion between them.
    fn run_boundary(&self, i: usize, expiry_ms: i64) -> bool {
        let (a, b) = (&self.touches[i - 1], &self.touches[i]);
        let next = self.pending.partition_point(|c| (c.ts, c.seq) <= (a.ts, a.seq));
        expired(a.ts, expiry_ms, b.ts) || self.pending.get(next).is_some_and(|c| (c.ts, c.seq) < (b.ts, b.seq))
    }

    /// Adds a conversion; it is credited once the watermark reaches its time.
    pub fn add_conversion(&mut self, c: Conversion) {
        let at = self.pending.partition_point(|x| (x.ts, x.seq) <= (c.ts, c.seq));
        self.pending.insert(at, c);
    }

    /// Index one past the end of the first segment of `touches`.
    fn first_segment_end(touches: &[Touch], expiry_ms: i64) -> usize {
        if touches.is_empty() {
            return 0;
        }
        let mut end = 1;
        while end < touches.len() && !expired(touches[end - 1].ts, expiry_ms, touches[end].ts) {
            end += 1;
        }
        end
    }

    /// The smallest watermark at which [`Journey::advance`] would change
    /// something: the earliest pending conversion, or the moment the first
    /// segment of touches expires. `None` when the journey is empty.
    pub fn next_wake(&self, rules: &Rules) -> Option<i64> {
        let conv = self.pending.first().map(|c| c.ts);
        let seg = match Self::first_segment_end(&self.touches, rules.expiry_ms) {
            0 => None,
            end => Some(self.touches[end - 1].ts.saturating_add(rules.expiry_ms).saturating_add(1)),
        };
        match (conv, seg) {
            (Some(a), Some(b)) => Some(a.min(b)),
            (a, b) => a.or(b),
        }
    }

    /// Moves the journey to `watermark`: credits every pending conversion at
    /// or before it and closes every segment of touches that expired before
    /// it, in time order, exactly as a replay in event-time order would.
    pub fn advance(&mut self, watermark: i64, rules: &Rules) -> Vec<Outcome> {
        let mut out = Vec::new();
        loop {
            let conv_key = self.pending.first().filter(|c| c.ts <= watermark).map(|c| (c.ts, c.seq));
            let limit = match conv_key {
                Some(k) => self.touches.partition_point(|t| (t.ts, t.seq) < k),
                None => self.touches.len(),
            };
            let horizon = conv_key.map(|k| k.0).unwrap_or(watermark);
            let seg_end = Self::first_segment_end(&self.touches[..limit], rules.expiry_ms);
            if seg_end > 0 && expired(self.touches[seg_end - 1].ts, rules.expiry_ms, horizon) {
                let path: Vec<Touch> = self.touches.drain(..seg_end).collect();
                out.push(Outcome::Expired { path });
                continue;
            }
            let Some((conv_ts, _)) = conv_key else { break };
            let conversion = self.pending.remove(0);
            let prior: Vec<Touch> = self.touches.drain(..limit).collect();
            let path = prior
                .into_iter()
                .filter(|t| {
                    let window = match t.interaction {
                        Interaction::Click => rules.lookback_ms,
                        Interaction::View => rules.view_lookback_ms.min(rules.lookback_ms),
                    };
                    t.ts >= conv_ts.saturating_sub(window)
                })
                .collect();
            debug_assert_eq!(conversion.ts, conv_ts);
            out.push(Outcome::Converted { conversion, path });
        }
        out
    }

    /// Closes everything: credits all pending conversions, then closes every
    /// remaining segment as a non-converting path (end of input).
    pub fn finish(&mut self, rules: &Rules) -> Vec<Outcome> {
        let mut out = self.advance(i64::MAX, rules);
        while !self.touches.is_empty() {
            let end = Self::first_segment_end(&self.touches, rules.expiry_ms);
            out.push(Outcome::Expired { path: self.touches.drain(..end).collect() });
        }
        out
    }
}

/// `last + expiry < now`, without overflow.
fn expired(last: i64, expiry_ms: i64, now: i64) -> bool {
    (last as i128) + (expiry_ms as i128) < now as i128
}
