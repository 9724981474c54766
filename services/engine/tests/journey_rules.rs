//! Journey rules of docs/contract.md ("Journey rules"), checked through the
//! replay loop on small hand-written inputs. Every expected value is derived
//! by hand from those rules (the contract of this project; no outside source).

use apportion_engine::contract::RejectReason;
use apportion_engine::replay::{replay_lines, ReplayResult};
use apportion_engine::{ModelId, ModelPlan, Pseudonymizer, Rules};

const DAY: i64 = 86_400_000;

fn run(lines: &[&str], rules: Rules) -> ReplayResult {
    let p = Pseudonymizer::new(b"test-key");
    replay_lines(lines, rules, &p, &ModelPlan { ids: vec![ModelId::Linear], ..ModelPlan::rules() })
}

fn touch(id: &str, user: &str, ts: i64, channel: &str) -> String {
    format!(r#"{{"type":"touch","event_id":"{id}","user_id":"{user}","timestamp":{ts},"channel":"{channel}"}}"#)
}

fn view(id: &str, user: &str, ts: i64, channel: &str) -> String {
    format!(
        r#"{{"type":"touch","event_id":"{id}","user_id":"{user}","timestamp":{ts},"channel":"{channel}","interaction":"view"}}"#
    )
}

fn conv(id: &str, user: &str, ts: i64) -> String {
    format!(r#"{{"type":"conversion","event_id":"{id}","user_id":"{user}","timestamp":{ts},"value":100}}"#)
}

fn refs(v: &[String]) -> Vec<&str> {
    v.iter().map(String::as_str).collect()
}

fn touches_of(r: &ReplayResult, conversion: &str) -> Vec<Option<String>> {
    r.rows.iter().filter(|x| x.conversion_id == conversion).map(|x| x.touch_event_id.clone()).collect()
}

#[test]
fn lookback_boundary_is_inclusive() {
    let t0 = 100 * DAY;
    let lines = [touch("a", "u", t0, "email"), touch("b", "u", t0 + 1, "seo"), conv("c", "u", t0 + 30 * DAY)];
    let r = run(&refs(&lines), Rules::default());
    // T - lookback <= t: the touch exactly 30 days before counts, so both do.
    assert_eq!(touches_of(&r, "c"), vec![Some("a".into()), Some("b".into())]);

    let lines = [touch("a", "u", t0 - 1, "email"), touch("b", "u", t0 + 1, "seo"), conv("c", "u", t0 + 30 * DAY)];
    let r = run(&refs(&lines), Rules::default());
    assert_eq!(touches_of(&r, "c"), vec![Some("b".into())]);
}

#[test]
fn view_lookback_is_separate() {
    let rules = Rules { view_lookback_ms: DAY, ..Rules::default() };
    let t = 100 * DAY;
    let lines = [
        view("v1", "u", t - 2 * DAY, "display"),
        view("v2", "u", t - DAY, "video"),
        touch("k", "u", t - 3 * DAY, "seo"),
        conv("c", "u", t),
    ];
    let r = run(&refs(&lines), rules);
    assert_eq!(touches_of(&r, "c"), vec![Some("k".into()), Some("v2".into())]);
}

#[test]
fn expiry_is_strict() {
    let rules = Rules { expiry_ms: 10 * DAY, ..Rules::default() };
    let t = 100 * DAY;
    // last_touch + expiry == conversion time: not expired (strictly less needed).
    let lines = [touch("a", "u", t, "email"), conv("c", "u", t + 10 * DAY)];
    let r = run(&refs(&lines), rules);
    assert_eq!(touches_of(&r, "c"), vec![Some("a".into())]);
    assert_eq!(r.paths.len(), 1);
    assert!(r.paths[0].converted);
    // One millisecond later it has expired: a non-converting path, then unattributed.
    let lines = [touch("a", "u", t, "email"), conv("c", "u", t + 10 * DAY + 1)];
    let r = run(&refs(&lines), rules);
    assert_eq!(touches_of(&r, "c"), vec![None]);
    assert_eq!(r.rows[0].channel, "unattributed");
    assert_eq!(r.paths.len(), 1);
    assert!(!r.paths[0].converted);
}

#[test]
fn expiry_driven_by_other_users_events() {
    let rules = Rules { expiry_ms: 10 * DAY, ..Rules::default() };
    let t = 100 * DAY;
    let lines = [
        touch("a", "u1", t, "email"),
        touch("b", "u2", t + 11 * DAY, "seo"),
        touch("c", "u1", t + 12 * DAY, "seo"),
        conv("x", "u1", t + 13 * DAY),
    ];
    let r = run(&refs(&lines), rules);
    assert_eq!(touches_of(&r, "x"), vec![Some("c".into())]);
    // Paths: u1's expired [email] and converting [seo], u2's [seo] at the end of input.
    let mut kinds: Vec<(bool, Vec<String>)> = r.paths.iter().map(|p| (p.converted, p.channels.clone())).collect();
    kinds.sort();
    assert_eq!(kinds, vec![(false, vec!["email".into()]), (false, vec!["seo".into()]), (true, vec!["seo".into()])]);
}

#[test]
fn clear_after_conversion() {
    let t = 100 * DAY;
    let lines = [
        touch("a", "u", t, "email"),
        conv("c1", "u", t + DAY),
        touch("b", "u", t + 2 * DAY, "seo"),
        conv("c2", "u", t + 3 * DAY),
    ];
    let r = run(&refs(&lines), Rules::default());
    assert_eq!(touches_of(&r, "c1"), vec![Some("a".into())]);
    assert_eq!(touches_of(&r, "c2"), vec![Some("b".into())]);
    // Older touches outside the lookback are dropped, not credited later.
    let lines = [
        touch("old", "u", t, "email"),
        touch("new", "u", t + 40 * DAY, "seo"),
        conv("c", "u", t + 41 * DAY),
        conv("d", "u", t + 42 * DAY),
    ];
    let r = run(&refs(&lines), Rules { expiry_ms: 60 * DAY, ..Rules::default() });
    assert_eq!(touches_of(&r, "c"), vec![Some("new".into())]);
    assert_eq!(touches_of(&r, "d"), vec![None]);
}

#[test]
fn unattributed_conversion() {
    let r = run(&[&conv("c", "u", 5 * DAY)], Rules::default());
    assert_eq!(r.rows.len(), 1);
    let row = &r.rows[0];
    assert_eq!(row.channel, "unattributed");
    assert_eq!(row.touch_event_id, None);
    assert_eq!(row.credit, 1.0);
    assert_eq!(row.credited_value, Some(100.0));
    assert!(r.paths.is_empty(), "paths with no touch are not paths");
}

#[test]
fn equal_timestamps_keep_arrival_order() {
    let t = 100 * DAY;
    // Touch b arrives after the conversion with the same timestamp: not credited.
    let lines = [touch("a", "u", t, "email"), conv("c", "u", t), touch("b", "u", t, "seo"), conv("d", "u", t + 1)];
    let r = run(&refs(&lines), Rules::default());
    assert_eq!(touches_of(&r, "c"), vec![Some("a".into())]);
    assert_eq!(touches_of(&r, "d"), vec![Some("b".into())]);
    // Two touches at the same time keep their input order in the path.
    let lines = [touch("y", "u", t, "seo"), touch("x", "u", t, "email"), conv("c", "u", t + 1)];
    let r = run(&refs(&lines), Rules::default());
    assert_eq!(touches_of(&r, "c"), vec![Some("y".into()), Some("x".into())]);
}

#[test]
fn unsorted_input_is_sorted_by_event_time() {
    let t = 100 * DAY;
    let lines = [conv("c", "u", t + 2 * DAY), touch("b", "u", t + DAY, "seo"), touch("a", "u", t, "email")];
    let r = run(&refs(&lines), Rules::default());
    assert_eq!(touches_of(&r, "c"), vec![Some("a".into()), Some("b".into())]);
}

#[test]
fn rfc3339_and_epoch_millis_mix() {
    // 2026-03-01T00:00:00Z is 1772323200000 ms (computed from the calendar, UTC).
    let lines = [
        r#"{"type":"touch","event_id":"a","user_id":"u","timestamp":"2026-03-01T00:00:00Z","channel":"email"}"#
            .to_string(),
        r#"{"type":"touch","event_id":"b","user_id":"u","timestamp":1772323200001,"channel":"seo"}"#.to_string(),
        r#"{"type":"conversion","event_id":"c","user_id":"u","timestamp":"2026-03-01T01:00:00+01:00"}"#.to_string(),
    ];
    let r = run(&refs(&lines), Rules::default());
    // The conversion at 01:00+01:00 is 00:00Z: after a, before b.
    assert_eq!(touches_of(&r, "c"), vec![Some("a".into())]);
    assert_eq!(r.rows[0].conversion_timestamp.to_string(), "2026-03-01T00:00:00.000Z");
}

#[test]
fn duplicates_are_dropped() {
    let t = 100 * DAY;
    let lines =
        [touch("a", "u", t, "email"), touch("a", "u", t, "email"), conv("c", "u", t + 1), conv("c", "u", t + 1)];
    let r = run(&refs(&lines), Rules::default());
    assert_eq!(r.duplicates, 2);
    assert_eq!(touches_of(&r, "c"), vec![Some("a".into())]);
}

#[test]
fn the_first_of_a_duplicate_in_input_order_wins() {
    // The same event id twice at different times (contract, "Input
    // events"): the first line is kept even though the second is earlier.
    // Kept: touch "a" on email at t; dropped: "a" on seo at t - 1 day.
    let t = 100 * DAY;
    let lines = [touch("a", "u", t, "email"), touch("a", "u", t - DAY, "seo"), conv("c", "u", t + 1)];
    let r = run(&refs(&lines), Rules::default());
    assert_eq!(r.duplicates, 1);
    assert_eq!(r.rows.len(), 1);
    assert_eq!((r.rows[0].channel.as_str(), r.rows[0].touch_timestamp.unwrap().ms()), ("email", t));
}

#[test]
fn erase_forgets_the_journey() {
    let t = 100 * DAY;
    let lines = [
        touch("a", "u", t, "email"),
        r#"{"type":"erase","user_id":"u","timestamp":8640000001}"#.to_string(),
        conv("c", "u", t + 2),
    ];
    let r = run(&refs(&lines), Rules::default());
    assert_eq!(touches_of(&r, "c"), vec![None]);
    assert!(r.paths.is_empty());
}

#[test]
fn each_broken_rule_is_rejected_and_the_rest_processed() {
    let t = 100 * DAY;
    let good = [touch("a", "u", t, "email"), conv("c", "u", t + 1)];
    let bad: Vec<(&str, RejectReason)> = vec![
        ("not json", RejectReason::InvalidJson),
        ("[1,2]", RejectReason::NotAnObject),
        (r#"{"event_id":"x","user_id":"u","timestamp":1}"#, RejectReason::MissingType),
        (r#"{"type":"click","event_id":"x","user_id":"u","timestamp":1}"#, RejectReason::InvalidType),
        (r#"{"type":"touch","user_id":"u","timestamp":1,"channel":"e"}"#, RejectReason::MissingEventId),
        (r#"{"type":"touch","event_id":"","user_id":"u","timestamp":1,"channel":"e"}"#, RejectReason::InvalidEventId),
        (r#"{"type":"touch","event_id":7,"user_id":"u","timestamp":1,"channel":"e"}"#, RejectReason::InvalidEventId),
        (r#"{"type":"touch","event_id":"x","timestamp":1,"channel":"e"}"#, RejectReason::MissingUserId),
        (r#"{"type":"touch","event_id":"x","user_id":"","timestamp":1,"channel":"e"}"#, RejectReason::InvalidUserId),
        (r#"{"type":"touch","event_id":"x","user_id":"u","channel":"e"}"#, RejectReason::MissingTimestamp),
        (
            r#"{"type":"touch","event_id":"x","user_id":"u","timestamp":"yesterday","channel":"e"}"#,
            RejectReason::InvalidTimestamp,
        ),
        (
            r#"{"type":"touch","event_id":"x","user_id":"u","timestamp":1.5,"channel":"e"}"#,
            RejectReason::InvalidTimestamp,
        ),
        (r#"{"type":"touch","event_id":"x","user_id":"u","timestamp":1}"#, RejectReason::MissingChannel),
        (r#"{"type":"touch","event_id":"x","user_id":"u","timestamp":1,"channel":3}"#, RejectReason::InvalidChannel),
        (
            r#"{"type":"touch","event_id":"x","user_id":"u","timestamp":1,"channel":"e","campaign":[]}"#,
            RejectReason::InvalidCampaign,
        ),
        (
            r#"{"type":"touch","event_id":"x","user_id":"u","timestamp":1,"channel":"e","interaction":"hover"}"#,
            RejectReason::InvalidInteraction,
        ),
        (r#"{"type":"conversion","event_id":"x","user_id":"u","timestamp":1,"goal":""}"#, RejectReason::InvalidGoal),
        (r#"{"type":"conversion","event_id":"x","user_id":"u","timestamp":1,"value":-1}"#, RejectReason::InvalidValue),
        (
            r#"{"type":"conversion","event_id":"x","user_id":"u","timestamp":1,"value":"12"}"#,
            RejectReason::InvalidValue,
        ),
        (
            r#"{"type":"conversion","event_id":"x","user_id":"u","timestamp":1,"currency":"euro"}"#,
            RejectReason::InvalidCurrency,
        ),
    ];
    let mut lines: Vec<String> = vec![good[0].clone()];
    lines.extend(bad.iter().map(|(l, _)| l.to_string()));
    lines.push(good[1].clone());
    let r = run(&refs(&lines), Rules::default());
    assert_eq!(touches_of(&r, "c"), vec![Some("a".into())]);
    assert_eq!(r.rejected.len(), bad.len());
    for ((line, reason), (want_line, want)) in r.rejected.iter().zip(bad.iter().enumerate()) {
        assert_eq!(reason.reason, want.1, "line {line}: {}", want.0);
        assert_eq!(*line, want_line as u64 + 2);
        assert!(!reason.detail.is_empty());
    }
}

#[test]
fn oversized_and_non_utf8_are_rejected() {
    use apportion_engine::contract::parse_event_limited;
    let big = format!(r#"{{"type":"touch","pad":"{}"}}"#, "x".repeat(2 << 20));
    assert_eq!(parse_event_limited(big.as_bytes(), 1 << 20).unwrap_err().reason, RejectReason::TooLarge);
    assert_eq!(parse_event_limited(b"{\"type\":\"\xff\"}", 1 << 20).unwrap_err().reason, RejectReason::InvalidUtf8);
}

#[test]
fn raw_user_id_never_reaches_output() {
    let t = 100 * DAY;
    let lines = [
        touch("a", "alice@example.org", t, "email"),
        conv("c", "alice@example.org", t + 1),
        touch("z", "alice@example.org", t + 2, "seo"),
    ];
    let r = run(&refs(&lines), Rules::default());
    let text = serde_json::to_string(&(&r.rows, &r.paths)).unwrap();
    assert!(!text.contains("alice"));
    assert_eq!(serde_json::to_value(&r.rows[0]).unwrap()["user_key"].as_str().unwrap().len(), 64);
}

#[test]
fn the_touch_cap_keeps_the_newest_touches_of_a_run() {
    // max_touches 3: five touches a day apart, then a conversion: the two
    // oldest are dropped, the conversion credits days 3, 4 and 5. After the
    // conversion a new run starts, with room for three touches again.
    let t0 = 100 * DAY;
    let mut lines: Vec<String> = (1..=5).map(|d| touch(&format!("t{d}"), "u", t0 + d * DAY, "email")).collect();
    lines.push(conv("c1", "u", t0 + 6 * DAY));
    lines.extend((7..=9).map(|d| touch(&format!("t{d}"), "u", t0 + d * DAY, "seo")));
    lines.push(conv("c2", "u", t0 + 10 * DAY));
    let r = run(&refs(&lines), Rules { max_touches: 3, ..Rules::default() });
    assert_eq!(touches_of(&r, "c1"), vec![Some("t3".into()), Some("t4".into()), Some("t5".into())]);
    assert_eq!(touches_of(&r, "c2"), vec![Some("t7".into()), Some("t8".into()), Some("t9".into())]);
    // No cap: all five.
    let r = run(&refs(&lines), Rules { max_touches: 0, ..Rules::default() });
    assert_eq!(touches_of(&r, "c1").len(), 5);
}

#[test]
fn touches_older_than_the_age_limit_leave_their_run() {
    // max_age 2 days, lookback 1 day, expiry 10 days: touches on days 0 to
    // 3 form one run; when day 3 arrives, day 0 is more than 2 days older
    // and goes. At the end of input the non-converting path holds days 1 to
    // 3. A conversion on day 3.5 credits only day 3 (lookback), as without
    // the limit: it never removes an eligible touch.
    let t0 = 100 * DAY;
    let rules =
        Rules { lookback_ms: DAY, view_lookback_ms: DAY, expiry_ms: 10 * DAY, max_age_ms: 2 * DAY, ..Rules::default() };
    let lines: Vec<String> = (0..=3).map(|d| touch(&format!("t{d}"), "u", t0 + d * DAY, &format!("ch{d}"))).collect();
    let r = run(&refs(&lines), rules);
    assert_eq!(r.paths.len(), 1);
    assert_eq!(r.paths[0].channels, ["ch1", "ch2", "ch3"]);
    let mut with_conv = lines.clone();
    with_conv.push(conv("c", "u", t0 + 3 * DAY + DAY / 2));
    let r = run(&refs(&with_conv), rules);
    assert_eq!(touches_of(&r, "c"), vec![Some("t3".into())]);
    let r = run(&refs(&with_conv), Rules { max_age_ms: 0, ..rules });
    assert_eq!(touches_of(&r, "c"), vec![Some("t3".into())]);
}

#[test]
fn a_late_touch_joining_two_runs_keeps_the_cap() {
    // max_touches 3, expiry 10 days (contract: Journey rules, Touch limits;
    // derived by hand): days 0, 1 and days 20, 21 are two runs (a 19-day
    // gap). A late touch on day 10 closes the gap (9 and 10 days, neither
    // longer than expiry): one run of five, so the two oldest go at once.
    // Found by the engine fuzz target (fuzz/regressions/engine).
    use apportion_engine::journey::{Journey, Touch};
    let rules = Rules { max_touches: 3, expiry_ms: 10 * DAY, ..Rules::default() };
    let t = |d: i64, seq: u64| Touch {
        event_id: format!("d{d}"),
        ts: d * DAY,
        seq,
        channel: "email".into(),
        campaign: None,
        interaction: apportion_engine::contract::Interaction::Click,
    };
    let mut j = Journey::default();
    for (seq, d) in [0, 1, 20, 21].into_iter().enumerate() {
        assert_eq!(j.add_touch_capped(t(d, seq as u64), &rules).cap, 0);
    }
    let dropped = j.add_touch_capped(t(10, 9), &rules);
    assert_eq!(dropped.cap, 2);
    let kept: Vec<&str> = j.touches.iter().map(|x| x.event_id.as_str()).collect();
    assert_eq!(kept, ["d10", "d20", "d21"]);
}
