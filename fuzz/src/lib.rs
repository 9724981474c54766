//! The checks behind the fuzz targets (DEVELOPERS.md, "Fuzzing").
//!
//! Each `check_*` function takes arbitrary bytes and panics when a rule is
//! broken; the AFL++ targets in `targets/` call them, and the unit tests at
//! the bottom run them over the seed corpus and over seeded random bytes, so
//! `cargo test` in this directory also checks them without AFL++.
//!
//! - [`check_event_json`]: the JSON event parser never panics, a rejection
//!   has a parser reason and a detail, an accepted event obeys every rule of
//!   docs/contract.md "Input events", and an accepted event written out
//!   again (JSON and protobuf) reads back as the same event.
//! - [`check_event_protobuf`]: the same for protobuf `InputEvent` bytes.
//! - [`check_engine_bytes`]: an arbitrary sequence of touches, conversions,
//!   erasures and watermark moves through the journey processor and every
//!   model; see [`check_engine`] for the invariants.

use std::collections::{BTreeMap, BTreeSet};

use apportion_contract::event::{MAX_EVENT_ID_BYTES, MAX_LABEL_BYTES, MAX_USER_ID_BYTES};
use apportion_contract::time::in_range;
use apportion_contract::{
    parse_event, parse_event_limited, CreditRow, Event, EventKind, Interaction, ModelId, RejectReason,
};
use apportion_engine::registry::{check_params, ModelPlan, RuleParams};
use apportion_engine::replay::two_pass::add_closed_path;
use apportion_engine::{
    credit_rows, Conversion, Effect, JourneyEvent, JourneyEventKind, JourneyStore, MemStore, Outcome, Processor, Rules,
    Touch, UserKey,
};
use arbitrary::{Arbitrary, Unstructured};

/// Reasons the parser itself may give (`late` and `future_timestamp` come
/// from the streaming policy and replay, never from the parser).
fn parser_reason(r: RejectReason) -> bool {
    !matches!(r, RejectReason::Late | RejectReason::FutureTimestamp)
}

/// Every rule of docs/contract.md "Input events" that an accepted event
/// must obey.
fn check_accepted(ev: &Event) {
    let text_ok = |s: &str, max: usize| !s.is_empty() && s.len() <= max && !s.contains('\0');
    match ev.kind {
        EventKind::Erase => assert!(ev.event_id.is_empty() || text_ok(&ev.event_id, MAX_EVENT_ID_BYTES)),
        _ => assert!(text_ok(&ev.event_id, MAX_EVENT_ID_BYTES), "event_id {:?}", ev.event_id),
    }
    // A raw id, or (erase only) a user key in its place.
    match ev.user_key {
        Some(_) => assert!(ev.kind == EventKind::Erase && ev.user_id.is_empty(), "user_key on {:?}", ev.kind),
        None => assert!(text_ok(&ev.user_id, MAX_USER_ID_BYTES), "user_id"),
    }
    assert!(in_range(ev.timestamp_ms), "timestamp {}", ev.timestamp_ms);
    match ev.kind {
        EventKind::Touch => {
            assert!(text_ok(&ev.channel, MAX_LABEL_BYTES), "channel {:?}", ev.channel);
            if let Some(c) = &ev.campaign {
                assert!(text_ok(c, MAX_LABEL_BYTES), "campaign {c:?}");
            }
            assert!(ev.goal.is_empty() && ev.value.is_none() && ev.currency.is_none());
        }
        EventKind::Conversion => {
            assert!(text_ok(&ev.goal, MAX_LABEL_BYTES), "goal {:?}", ev.goal);
            if let Some(v) = ev.value {
                assert!(v.is_finite() && v >= 0.0 && v.is_sign_positive(), "value {v}");
            }
            if let Some(c) = &ev.currency {
                assert!(apportion_contract::event::is_currency_code(c), "currency {c:?}");
            }
            assert!(ev.channel.is_empty() && ev.campaign.is_none() && ev.interaction == Interaction::Click);
        }
        EventKind::Erase => {
            assert!(ev.channel.is_empty() && ev.goal.is_empty() && ev.value.is_none());
        }
    }
}

/// The JSON line of an accepted event as the contract writes it (only the
/// fields its kind reads; the time as epoch milliseconds).
pub fn canonical_json(ev: &Event) -> String {
    serde_json::Value::Object(apportion_contract::event::event_fields(ev, &ev.user_id)).to_string()
}

/// An accepted event written out again, in JSON and in protobuf, is read
/// back as the same event.
fn check_round_trips(ev: &Event) {
    let line = canonical_json(ev);
    assert_eq!(parse_event(line.as_bytes()).as_ref(), Ok(ev), "JSON round trip of {line}");
    let pb = apportion_wire::encode_event_protobuf(&line)
        .unwrap_or_else(|e| panic!("an accepted event has a protobuf form: {e}"));
    assert_eq!(apportion_wire::decode_event_protobuf(&pb, usize::MAX).as_ref(), Ok(ev), "protobuf round trip");
}

/// The JSON parser on arbitrary bytes.
pub fn check_event_json(data: &[u8]) {
    let got = parse_event(data);
    // Deterministic, and the size limit is the only difference a limit makes.
    assert_eq!(parse_event(data), got);
    let limit = data.len().saturating_sub(1);
    match parse_event_limited(data, limit) {
        Err(r) if data.len() > limit => assert_eq!(r.reason, RejectReason::TooLarge),
        other => assert_eq!(other, got),
    }
    match &got {
        Err(r) => {
            assert!(parser_reason(r.reason), "{r:?}");
            assert!(!r.detail.is_empty());
        }
        Ok(ev) => {
            check_accepted(ev);
            check_round_trips(ev);
        }
    }
}

/// The protobuf decoder on arbitrary bytes.
pub fn check_event_protobuf(data: &[u8]) {
    use prost::Message;
    let got = apportion_wire::decode_event_protobuf(data, usize::MAX);
    assert_eq!(apportion_wire::decode_event_protobuf(data, usize::MAX), got);
    let (kind, id) = apportion_wire::sniff_protobuf(data);
    if let Some(id) = &id {
        assert!(id.len() <= MAX_EVENT_ID_BYTES);
    }
    match apportion_wire::pb::InputEvent::decode(data) {
        Err(_) => {
            let r = got.expect_err("undecodable bytes are rejected");
            assert_eq!(r.reason, RejectReason::InvalidJson);
            assert!(r.detail.starts_with("not a valid protobuf InputEvent"), "{}", r.detail);
            assert_eq!((kind, id), (None, None));
        }
        Ok(msg) => {
            // Exactly the JSON contract's verdict on the message's JSON form.
            let json = apportion_wire::to_contract_json(&msg);
            assert_eq!(parse_event_limited(&json, usize::MAX), got);
            match &got {
                Err(r) => assert!(parser_reason(r.reason), "{r:?}"),
                Ok(ev) => {
                    check_accepted(ev);
                    assert_eq!(kind, Some(ev.kind));
                    check_round_trips(ev);
                }
            }
        }
    }
}

/// An event time: relative to a base in minutes, or one of the ends of the
/// accepted range (to reach the overflow edges of the journey rules).
#[derive(Debug, Clone, Copy, Arbitrary)]
pub enum When {
    /// Base + minutes.
    Minutes(i16),
    /// The earliest accepted instant, 0001-01-01.
    Earliest,
    /// The latest accepted instant, 9999-12-31.
    Latest,
}

/// 2026-03-01T00:00:00Z in epoch ms (derived by hand: 20 513 days after
/// 1970-01-01, times 86 400 000).
pub const BASE_MS: i64 = 1_772_323_200_000;

impl When {
    fn ms(self) -> i64 {
        match self {
            When::Minutes(m) => BASE_MS + i64::from(m) * 60_000,
            When::Earliest => apportion_contract::time::MIN_TIMESTAMP_MS,
            When::Latest => apportion_contract::time::MAX_TIMESTAMP_MS,
        }
    }
}

/// One step of a fuzzed scenario.
#[derive(Debug, Clone, Arbitrary)]
pub enum Op {
    /// A touch of user `user % 6` on channel `channel % 9`.
    Touch {
        /// User.
        user: u8,
        /// Time.
        at: When,
        /// Channel index.
        channel: u8,
        /// A view instead of a click.
        view: bool,
    },
    /// `count % 64 + 1` touches of one user a minute apart (long paths).
    Burst {
        /// User.
        user: u8,
        /// Time of the first.
        at: When,
        /// How many.
        count: u8,
    },
    /// A conversion.
    Conversion {
        /// User.
        user: u8,
        /// Time.
        at: When,
        /// Value in cents.
        value: Option<u32>,
    },
    /// Forget the user.
    Erase {
        /// User.
        user: u8,
        /// Time.
        at: When,
    },
    /// Move the streaming watermark (never backwards).
    Watermark(When),
}

/// A fuzzed scenario: journey rules, model parameters and steps.
#[derive(Debug, Clone, Arbitrary)]
pub struct Scenario {
    /// Lookback, hours (0..=255).
    pub lookback_h: u8,
    /// View lookback, hours.
    pub view_lookback_h: u8,
    /// Expiry, hours.
    pub expiry_h: u8,
    /// `time_decay` half-life, minutes (+1).
    pub half_life_min: u16,
    /// `u_shaped` endpoint weights, in 1/255.
    pub u_first: u8,
    /// See `u_first`.
    pub u_last: u8,
    /// Markov order, `% 4 + 1`.
    pub markov_order: u8,
    /// `max_touches_per_journey`, `% 33` (0: no cap; small caps so that
    /// bursts hit them).
    pub max_touches: u8,
    /// The steps.
    pub ops: Vec<Op>,
}

const CHANNELS: [&str; 9] = ["email", "search", "social", "display", "affiliate", "video", "radio", "print", "sms"];

/// Expands the steps into journey events (in arrival order) and watermark
/// moves: `(Some(event), _)` or `(None, watermark)`.
fn expand(s: &Scenario) -> Vec<(Option<JourneyEvent>, i64)> {
    let key = |u: u8| UserKey([u % 6 + 1; 32]);
    let mut out = Vec::new();
    let mut seq = 0u64;
    let mut next = || {
        seq += 1;
        seq
    };
    for op in &s.ops {
        match *op {
            Op::Touch { user, at, channel, view } => {
                let n = next();
                out.push((Some(touch(key(user), n, at.ms(), CHANNELS[channel as usize % 9], view)), 0));
            }
            Op::Burst { user, at, count } => {
                for i in 0..=i64::from(count % 64) {
                    let n = next();
                    let ts = at.ms().saturating_add(i * 60_000).min(apportion_contract::time::MAX_TIMESTAMP_MS);
                    out.push((Some(touch(key(user), n, ts, CHANNELS[(i % 9) as usize], i % 3 == 0)), 0));
                }
            }
            Op::Conversion { user, at, value } => {
                let n = next();
                let c = Conversion {
                    event_id: format!("c{n}"),
                    ts: at.ms(),
                    seq: n,
                    goal: "purchase".into(),
                    value: value.map(|v| f64::from(v) / 100.0),
                    currency: value.map(|_| "EUR".into()),
                };
                out.push((
                    Some(JourneyEvent { user_key: key(user), seq: n, kind: JourneyEventKind::Conversion(c) }),
                    0,
                ));
            }
            Op::Erase { user, at } => {
                let n = next();
                out.push((
                    Some(JourneyEvent { user_key: key(user), seq: n, kind: JourneyEventKind::Erase { ts: at.ms() } }),
                    0,
                ));
            }
            Op::Watermark(at) => out.push((None, at.ms())),
        }
    }
    out
}

fn touch(user_key: UserKey, seq: u64, ts: i64, channel: &str, view: bool) -> JourneyEvent {
    let t = Touch {
        event_id: format!("t{seq}"),
        ts,
        seq,
        channel: channel.into(),
        campaign: seq.is_multiple_of(2).then(|| "spring".into()),
        interaction: if view { Interaction::View } else { Interaction::Click },
    };
    JourneyEvent { user_key, seq, kind: JourneyEventKind::Touch(t) }
}

/// The credit rows of one conversion under one model: one per path touch
/// (one `unattributed` row for an empty path), each credit finite and
/// >= 0, summing to 1 within 1e-9 (docs/contract.md, "Models").
pub fn check_credit_rows(model: ModelId, rows: &[CreditRow], path_len: usize) {
    assert_eq!(rows.len(), path_len.max(1), "{model}: rows per path");
    let sum: f64 = rows.iter().map(|r| r.credit).sum();
    assert!((sum - 1.0).abs() <= 1e-9, "{model} credits sum to {sum} over {path_len} touches");
    for r in rows {
        assert!(r.credit.is_finite() && r.credit >= 0.0, "{model} credit {}", r.credit);
        if let Some(v) = r.credited_value {
            assert!(v.is_finite() && v >= 0.0 && v.is_sign_positive(), "{model} credited value {v}");
        }
    }
}

/// Lengths of the runs of `touches` (docs/contract.md, "Touch cap"): a new
/// run starts after a gap longer than `expiry` or a pending conversion.
/// Written out here, not taken from the engine, so that it checks it.
fn runs(touches: &[Touch], pending: &[Conversion], expiry_ms: i64) -> Vec<usize> {
    let mut out = Vec::new();
    let mut len = 0;
    for (i, t) in touches.iter().enumerate() {
        if i > 0 {
            let a = &touches[i - 1];
            let gap = i128::from(a.ts) + i128::from(expiry_ms) < i128::from(t.ts);
            let between = pending.iter().any(|c| (a.ts, a.seq) < (c.ts, c.seq) && (c.ts, c.seq) < (t.ts, t.seq));
            if gap || between {
                out.push(len);
                len = 0;
            }
        }
        len += 1;
    }
    if len > 0 {
        out.push(len);
    }
    out
}

/// Runs the steps through a processor over a [`MemStore`], streaming style:
/// events in arrival order, the watermark moved only by `Watermark` steps
/// (so events may be ahead of it or, as with `late_policy = "apply"`,
/// behind it). Returns every effect in order.
fn stream(rules: Rules, steps: &[(Option<JourneyEvent>, i64)]) -> Vec<Effect> {
    let p = Processor::new(rules);
    let mut store = MemStore::default();
    let mut wm = i64::MIN;
    let mut out = Vec::new();
    for (ev, w) in steps {
        match ev {
            Some(ev) => {
                let key = ev.user_key;
                let is_erase = matches!(ev.kind, JourneyEventKind::Erase { .. });
                out.extend(p.apply(&mut store, ev.clone(), wm).unwrap());
                if is_erase {
                    // Erase leaves nothing of the user behind.
                    assert_eq!(store.load(&key).unwrap(), None, "erase left state behind");
                }
            }
            None => {
                wm = wm.max(*w);
                out.extend(p.advance(&mut store, wm).unwrap());
            }
        }
        // What is held is non-empty and in (time, arrival) order.
        for key in store.keys().unwrap() {
            let j = store.load(&key).unwrap().expect("listed key has a journey");
            assert!(!j.is_empty(), "an empty journey is stored");
            assert!(j.touches.windows(2).all(|w| (w[0].ts, w[0].seq) <= (w[1].ts, w[1].seq)), "touches out of order");
            assert!(j.pending.windows(2).all(|w| (w[0].ts, w[0].seq) <= (w[1].ts, w[1].seq)), "pending out of order");
            if rules.max_touches > 0 {
                let longest = runs(&j.touches, &j.pending, rules.expiry_ms).into_iter().max().unwrap_or(0);
                assert!(longest <= rules.max_touches, "a run of {longest} touches, cap {}", rules.max_touches);
            }
        }
    }
    out.extend(p.finish(&mut store).unwrap());
    // End of input closes everything: no memory is kept.
    assert!(store.is_empty(), "finish left {} journeys open", store.len());
    assert!(store.due(i64::MAX).unwrap().is_empty(), "wake index not emptied");
    out
}

/// The engine on a fuzzed scenario. Invariants:
/// - no panic (debug assertions and overflow checks are on in the fuzz
///   profile);
/// - streaming: after every step each stored journey is non-empty and
///   sorted; an erase leaves nothing of its user; `finish` leaves the store
///   and its wake index empty;
/// - every conversion not erased before it was credited is credited exactly
///   once, every touch is in at most one closed path, paths are in time
///   order and within the lookback of their conversion;
/// - under every model (the five rule models, `shapley` and `markov` fitted
///   on the run's own closed paths) each conversion's credits are finite,
///   at least 0 and sum to 1 within 1e-9, with one row per path touch (one
///   `unattributed` row for an empty path);
/// - without erasures and with the watermark never passing an event still
///   to come, the streaming outcomes equal replay's (events sorted by time,
///   watermark = each event's time), as journey.rs promises.
///
/// Memory: with `max_touches` set, no run of a stored journey and no path
/// holds more touches than the cap (touches dropped only under a cap), and
/// nothing outlives `finish`.
pub fn check_engine(s: &Scenario) {
    let day = 3_600_000;
    let rules = Rules {
        lookback_ms: i64::from(s.lookback_h) * day,
        view_lookback_ms: i64::from(s.view_lookback_h) * day,
        expiry_ms: i64::from(s.expiry_h) * day,
        max_touches: usize::from(s.max_touches % 33),
        // The high bit turns the age limit on: twice the lookback (it is at
        // least the lookback, as the configuration requires).
        max_age_ms: if s.max_touches >= 128 { 2 * i64::from(s.lookback_h) * day } else { 0 },
    };
    let mut params = RuleParams {
        half_life_ms: (i64::from(s.half_life_min) + 1) * 60_000,
        u_first: f64::from(s.u_first) / 255.0,
        u_last: f64::from(s.u_last) / 255.0,
    };
    params.u_last = params.u_last.min(1.0 - params.u_first);
    check_params(&params).expect("generated parameters are valid");
    let plan = ModelPlan {
        ids: ModelId::ALL.to_vec(),
        params,
        markov_order: usize::from(s.markov_order % 4) + 1,
        ..ModelPlan::rules()
    };

    let steps = expand(s);
    let effects = stream(rules, &steps);

    // Fit on the run's own closed paths, then credit with every model.
    let mut stats = plan.empty_stats();
    for e in &effects {
        add_closed_path(&mut stats, e);
    }
    let models = plan.build(Some(&stats));

    // Which conversions must be credited: those not followed (in arrival
    // order) by an erase of their user that reached them still pending.
    let mut credited: BTreeMap<String, usize> = BTreeMap::new();
    let mut touches_seen: BTreeSet<String> = BTreeSet::new();
    for e in &effects {
        match e {
            Effect::Journey { user_key, outcome } => {
                let path = match outcome {
                    Outcome::Converted { conversion, path } => {
                        *credited.entry(conversion.event_id.clone()).or_default() += 1;
                        for t in path {
                            let window = match t.interaction {
                                Interaction::Click => rules.lookback_ms,
                                Interaction::View => rules.view_lookback_ms.min(rules.lookback_ms),
                            };
                            assert!(t.ts <= conversion.ts, "touch after its conversion");
                            assert!(t.ts >= conversion.ts.saturating_sub(window), "touch outside the lookback");
                        }
                        for m in &models {
                            check_credit_rows(m.id(), &credit_rows(user_key, conversion, path, m.as_ref()), path.len());
                        }
                        path
                    }
                    Outcome::Expired { path } => {
                        assert!(!path.is_empty(), "an empty expired path");
                        path
                    }
                };
                assert!(path.windows(2).all(|w| (w[0].ts, w[0].seq) <= (w[1].ts, w[1].seq)), "path out of order");
                if rules.max_touches > 0 {
                    assert!(
                        path.len() <= rules.max_touches,
                        "a path of {} touches, cap {}",
                        path.len(),
                        rules.max_touches
                    );
                }
                if rules.max_age_ms > 0 {
                    let span = path.last().map_or(0, |l| l.ts - path[0].ts);
                    assert!(span <= rules.max_age_ms, "a path spanning {span} ms, age limit {}", rules.max_age_ms);
                }
                for t in path {
                    assert!(touches_seen.insert(t.event_id.clone()), "touch {} in two paths", t.event_id);
                }
            }
            Effect::Erased { .. } => {}
            Effect::TouchesDropped { cap, age, .. } => {
                assert!(*cap == 0 || rules.max_touches > 0, "{cap} touches dropped without a cap");
                assert!(*age == 0 || rules.max_age_ms > 0, "{age} touches dropped without an age limit");
                assert!(cap + age > 0, "an empty drop");
            }
        }
    }
    assert!(credited.values().all(|&n| n == 1), "a conversion credited twice: {credited:?}");
    // Conversions never erased are all credited.
    let erased_users: BTreeSet<UserKey> = steps
        .iter()
        .filter_map(|(e, _)| e.as_ref())
        .filter(|e| matches!(e.kind, JourneyEventKind::Erase { .. }))
        .map(|e| e.user_key)
        .collect();
    for (e, _) in &steps {
        if let Some(JourneyEvent { user_key, kind: JourneyEventKind::Conversion(c), .. }) = e {
            if !erased_users.contains(user_key) {
                assert_eq!(credited.get(&c.event_id), Some(&1), "conversion {} not credited", c.event_id);
            }
        }
    }

    // Streaming equals replay without limits; with them only for input that
    // arrives in time order (a touch arriving before an older conversion
    // can be dropped from a run that replay would have split).
    check_stream_equals_replay(Rules { max_touches: 0, max_age_ms: 0, ..rules }, &steps);
    let events: Vec<&JourneyEvent> = steps.iter().filter_map(|(e, _)| e.as_ref()).collect();
    if events.windows(2).all(|w| (w[0].ts(), w[0].seq) <= (w[1].ts(), w[1].seq)) {
        check_stream_equals_replay(rules, &steps);
    }
}

/// Streaming (arrival order, watermark held at or below every event still
/// to come) against replay (time order, watermark = each event's time).
fn check_stream_equals_replay(rules: Rules, steps: &[(Option<JourneyEvent>, i64)]) {
    let events: Vec<JourneyEvent> = steps
        .iter()
        .filter_map(|(e, _)| e.clone())
        .filter(|e| !matches!(e.kind, JourneyEventKind::Erase { .. }))
        .collect();
    // Watermark steps clamped to the earliest event still to come.
    let mut clamped = Vec::new();
    let mut rest_min = vec![i64::MAX; events.len() + 1];
    for i in (0..events.len()).rev() {
        rest_min[i] = rest_min[i + 1].min(events[i].ts());
    }
    let mut i = 0;
    for (e, w) in steps {
        match e {
            Some(e) if matches!(e.kind, JourneyEventKind::Erase { .. }) => {}
            Some(_) => {
                clamped.push((Some(events[i].clone()), 0));
                i += 1;
            }
            None => clamped.push((None, (*w).min(rest_min[i]))),
        }
    }
    let streamed = stream(rules, &clamped);

    let mut sorted = events;
    sorted.sort_by_key(|e| (e.ts(), e.seq));
    let mut replayer = apportion_engine::replay::Replayer::new(rules, MemStore::default());
    let mut replayed = Vec::new();
    for e in sorted {
        replayed.extend(replayer.push(e).unwrap());
    }
    replayed.extend(replayer.finish().unwrap());

    let canon = |effects: &[Effect]| {
        let mut v: Vec<String> = effects.iter().map(|e| format!("{e:?}")).collect();
        v.sort();
        v
    };
    assert_eq!(canon(&streamed), canon(&replayed), "streaming and replay disagree");
}

/// [`check_engine`] on a scenario built from arbitrary bytes.
pub fn check_engine_bytes(data: &[u8]) {
    let Some(s) = scenario(data) else { return };
    check_engine(&s);
}

/// The scenario of `data`: the header fields, then one step per few bytes
/// until the bytes run out (every byte counts, unlike a length-prefixed
/// list), at most 64 steps so that one input is bounded work.
pub fn scenario(data: &[u8]) -> Option<Scenario> {
    let mut u = Unstructured::new(data);
    let mut s = Scenario {
        lookback_h: u.arbitrary().ok()?,
        view_lookback_h: u.arbitrary().ok()?,
        expiry_h: u.arbitrary().ok()?,
        half_life_min: u.arbitrary().ok()?,
        u_first: u.arbitrary().ok()?,
        u_last: u.arbitrary().ok()?,
        markov_order: u.arbitrary().ok()?,
        max_touches: u.arbitrary().ok()?,
        ops: Vec::new(),
    };
    while !u.is_empty() && s.ops.len() < 64 {
        s.ops.push(Op::arbitrary(&mut u).ok()?);
    }
    Some(s)
}

#[cfg(test)]
mod tests;
