//! Invariants by proptest: credit sums to 1 with no negatives for every rule
//! model, output independent of input order (ties keep their order), and
//! coarse watermarks (the streaming service) give the same outcomes as
//! replay's per-event watermark.
//! The invariants are those of docs/contract.md ("Models": fractions >= 0
//! summing to 1 within 1e-9; "Journey rules": path order; "Determinism").

use apportion_engine::journey::{Conversion, Journey, Outcome, Rules, Touch};
use apportion_engine::model::{FirstTouch, LastTouch, Linear, Model, TimeDecay, UShaped};
use apportion_engine::replay::replay_lines;
use apportion_engine::{Interaction, ModelPlan, Pseudonymizer};
use proptest::prelude::*;

const DAY: i64 = 86_400_000;

fn arb_path() -> impl Strategy<Value = (Vec<Touch>, i64)> {
    prop::collection::vec((0i64..40 * DAY, 0usize..4, any::<bool>()), 1..12).prop_map(|v| {
        let conv = 40 * DAY;
        let mut touches: Vec<Touch> = v
            .into_iter()
            .enumerate()
            .map(|(i, (ts, ch, view))| Touch {
                event_id: format!("t{i}"),
                ts,
                seq: i as u64,
                channel: ["a", "b", "c", "d"][ch].into(),
                campaign: None,
                interaction: if view { Interaction::View } else { Interaction::Click },
            })
            .collect();
        touches.sort_by_key(|t| (t.ts, t.seq));
        (touches, conv)
    })
}

proptest! {
    #[test]
    fn rule_credits_are_non_negative_and_sum_to_one(
        (path, conv) in arb_path(),
        half_life in 1i64..30 * DAY,
        first in 0.0f64..0.5,
        last in 0.0f64..0.5,
    ) {
        let models: Vec<Box<dyn Model>> = vec![
            Box::new(LastTouch), Box::new(FirstTouch), Box::new(Linear),
            Box::new(TimeDecay { half_life_ms: half_life }), Box::new(UShaped { first, last }),
        ];
        for m in &models {
            let w = m.credit(&path, conv);
            prop_assert_eq!(w.len(), path.len());
            prop_assert!(w.iter().all(|x| *x >= 0.0 && x.is_finite()), "{} {:?}", m.id(), w);
            let sum: f64 = w.iter().sum();
            prop_assert!((sum - 1.0).abs() <= 1e-9, "{} sums to {}", m.id(), sum);
        }
    }
}

#[derive(Debug, Clone)]
struct Ev {
    user: u8,
    ts: i64,
    conv: bool,
    channel: u8,
}

fn arb_events() -> impl Strategy<Value = Vec<Ev>> {
    // Few distinct timestamps so ties are common.
    prop::collection::vec((0u8..4, 0i64..60, prop::bool::weighted(0.25), 0u8..4), 1..60).prop_map(|v| {
        v.into_iter().map(|(user, t, conv, channel)| Ev { user, ts: t * DAY / 2, conv, channel }).collect()
    })
}

fn lines_of(events: &[Ev]) -> Vec<String> {
    events
        .iter()
        .enumerate()
        .map(|(i, e)| {
            if e.conv {
                format!(
                    r#"{{"type":"conversion","event_id":"e{i}","user_id":"u{}","timestamp":{},"value":10}}"#,
                    e.user, e.ts
                )
            } else {
                format!(
                    r#"{{"type":"touch","event_id":"e{i}","user_id":"u{}","timestamp":{},"channel":"ch{}"}}"#,
                    e.user, e.ts, e.channel
                )
            }
        })
        .collect()
}

fn replay_all(lines: &[String]) -> Vec<String> {
    let p = Pseudonymizer::new(b"k");
    let refs: Vec<&str> = lines.iter().map(String::as_str).collect();
    let rules = Rules { lookback_ms: 10 * DAY, view_lookback_ms: 10 * DAY, expiry_ms: 7 * DAY, ..Rules::default() };
    let r = replay_lines(&refs, rules, &p, &ModelPlan::rules());
    let mut out: Vec<String> = r.rows.iter().map(|x| serde_json::to_string(x).unwrap()).collect();
    out.extend(r.paths.iter().map(|x| serde_json::to_string(x).unwrap()));
    out.sort();
    out
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(128))]
    #[test]
    fn shuffling_input_keeps_output(events in arb_events(), seed in any::<u64>()) {
        // Shuffle, then restore the relative order of events with equal
        // timestamps (the tie rule depends on it).
        let lines = lines_of(&events);
        let mut idx: Vec<usize> = (0..events.len()).collect();
        let mut s = seed | 1;
        for i in (1..idx.len()).rev() {
            s ^= s << 13; s ^= s >> 7; s ^= s << 17;
            idx.swap(i, (s % (i as u64 + 1)) as usize);
        }
        // Among equal timestamps, positions keep the original relative order.
        let mut by_ts: std::collections::BTreeMap<i64, Vec<usize>> = Default::default();
        for &i in &idx { by_ts.entry(events[i].ts).or_default().push(i); }
        for v in by_ts.values_mut() { v.sort(); }
        let mut cursor: std::collections::BTreeMap<i64, usize> = Default::default();
        let shuffled: Vec<String> = idx.iter().map(|&i| {
            let ts = events[i].ts;
            let c = cursor.entry(ts).or_default();
            let j = by_ts[&ts][*c];
            *c += 1;
            lines[j].clone()
        }).collect();
        // Credit ids and the rows themselves do not depend on line numbers.
        prop_assert_eq!(replay_all(&lines), replay_all(&shuffled));
    }
}

/// Replays one user's items with the watermark at each item's time.
fn outcomes_per_event(items: &[(i64, u64, bool)], rules: &Rules) -> Vec<Outcome> {
    let mut j = Journey::default();
    let mut out = Vec::new();
    let mut sorted = items.to_vec();
    sorted.sort_by_key(|(ts, seq, _)| (*ts, *seq));
    for (ts, seq, conv) in sorted {
        out.extend(j.advance(ts, rules));
        add(&mut j, ts, seq, conv);
        out.extend(j.advance(ts, rules));
    }
    out.extend(j.finish(rules));
    out
}

fn add(j: &mut Journey, ts: i64, seq: u64, conv: bool) {
    add_capped(j, ts, seq, conv, &Rules { max_touches: 0, ..Rules::default() });
}

fn add_capped(j: &mut Journey, ts: i64, seq: u64, conv: bool, rules: &Rules) {
    if conv {
        j.add_conversion(Conversion {
            event_id: format!("c{seq}"),
            ts,
            seq,
            goal: "g".into(),
            value: None,
            currency: None,
        });
    } else {
        j.add_touch_capped(
            Touch {
                event_id: format!("t{seq}"),
                ts,
                seq,
                channel: format!("ch{}", seq % 3),
                campaign: None,
                interaction: Interaction::Click,
            },
            rules,
        );
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]
    #[test]
    fn coarse_watermarks_match_replay(
        raw in prop::collection::vec((0i64..200, prop::bool::weighted(0.3)), 1..40),
        lateness in 0i64..30,
        step in 1usize..8,
    ) {
        // Events arrive shuffled within `lateness` (arrival order = time plus
        // a bounded jitter); the watermark is max seen - lateness, advanced
        // only every `step` arrivals. Outcomes must equal replay's.
        let rules = Rules { lookback_ms: 50, view_lookback_ms: 50, expiry_ms: 20, ..Rules::default() };
        let items: Vec<(i64, u64, bool)> = raw.iter().enumerate().map(|(i, (ts, c))| (*ts, i as u64, *c)).collect();
        let want = outcomes_per_event(&items, &rules);

        let mut arrival: Vec<(i64, u64, bool)> = items.clone();
        arrival.sort_by_key(|(ts, seq, _)| ((ts + (*seq as i64 * 7919) % (lateness + 1)), *seq));
        let mut j = Journey::default();
        let mut got = Vec::new();
        let mut max_seen = i64::MIN;
        let mut wm = i64::MIN;
        for (k, (ts, seq, conv)) in arrival.iter().enumerate() {
            // An event at or before the watermark would be late: with jitter
            // <= lateness that cannot happen (the watermark is the largest
            // time seen minus lateness minus 1, and every later arrival is at
            // most `lateness` before it).
            prop_assert!(*ts > wm, "event at {ts} arrived at watermark {wm}");
            add(&mut j, *ts, *seq, *conv);
            max_seen = max_seen.max(*ts);
            if k % step == 0 {
                // Watermark stays below every event still to arrive.
                wm = wm.max(max_seen - lateness - 1);
                got.extend(j.advance(wm, &rules));
            }
        }
        got.extend(j.finish(&rules));
        prop_assert_eq!(got, want);
    }
}

/// The most touches in one run of `j` (touches with no pending conversion
/// and no gap longer than `expiry_ms` between them).
fn longest_run(j: &Journey, expiry_ms: i64) -> usize {
    let (mut longest, mut run) = (0, 0);
    for (i, t) in j.touches.iter().enumerate() {
        let split = i > 0 && {
            let p = &j.touches[i - 1];
            p.ts + expiry_ms < t.ts
                || j.pending.iter().any(|c| (p.ts, p.seq) < (c.ts, c.seq) && (c.ts, c.seq) < (t.ts, t.seq))
        };
        run = if split { 1 } else { run + 1 };
        longest = longest.max(run);
    }
    longest
}

/// [`outcomes_per_event`] under the touch cap of `rules`.
fn capped_outcomes_per_event(items: &[(i64, u64, bool)], rules: &Rules) -> Vec<Outcome> {
    let mut j = Journey::default();
    let mut out = Vec::new();
    for &(ts, seq, conv) in items {
        add_capped(&mut j, ts, seq, conv, rules);
        out.extend(j.advance(ts, rules));
    }
    out.extend(j.finish(rules));
    out
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]
    #[test]
    fn the_touch_cap_does_not_depend_on_the_watermark(
        raw in prop::collection::vec((0i64..400, prop::bool::weighted(0.05)), 1..120),
        cap in 0usize..5,
        max_age in prop_oneof![Just(0i64), 50i64..120],
        lateness in 0i64..30,
        step in 1usize..8,
    ) {
        // Events in time order; the streaming watermark lags (allowed
        // lateness) and moves every `step` events, so conversions wait while
        // later touches arrive. The cap works per run (between pending
        // conversions and expiry gaps), so the outcomes equal those of the
        // watermark at each event's time (contract: Journey rules, Touch
        // cap; derived by hand from the run definition). Every path holds at
        // most `cap` touches and spans at most `max_age` (0: no limit).
        let rules = Rules { lookback_ms: 50, view_lookback_ms: 50, expiry_ms: 20, max_touches: cap, max_age_ms: max_age };
        let mut items: Vec<(i64, u64, bool)> =
            raw.iter().enumerate().map(|(i, (ts, c))| (*ts, i as u64, *c)).collect();
        items.sort_by_key(|(ts, seq, _)| (*ts, *seq));
        let want = capped_outcomes_per_event(&items, &rules);
        let mut j = Journey::default();
        let mut got = Vec::new();
        for (k, &(ts, seq, conv)) in items.iter().enumerate() {
            add_capped(&mut j, ts, seq, conv, &rules);
            if k % step == 0 {
                got.extend(j.advance(ts - lateness - 1, &rules));
            }
            prop_assert!(cap == 0 || longest_run(&j, rules.expiry_ms) <= cap, "memory within the cap");
        }
        got.extend(j.finish(&rules));
        for o in &got {
            if let Some((_, path)) = o.closed_path() {
                prop_assert!(cap == 0 || path.len() <= cap, "a path of {} touches under cap {cap}", path.len());
                let span = path.last().unwrap().ts - path[0].ts;
                prop_assert!(max_age == 0 || span <= max_age, "a path spanning {span} under max_age {max_age}");
            }
        }
        prop_assert_eq!(got, want);
    }
}
