//! The same events in either encoding are accepted or rejected alike and
//! give identical credit rows and path rows.

use apportion_engine::contract::event::{parse_event, DEFAULT_MAX_EVENT_BYTES};
use apportion_engine::contract::{Event, RejectReason, Rejection};
use apportion_engine::replay::{effect_rows, journey_event, replay_lines, two_pass, FirstSeen};
use apportion_engine::{CreditRow, MemStore, PathRow, Pseudonymizer, Rules};
use apportion_wire::pb::{self, input_event::Timestamp};
use apportion_wire::{decode_event_protobuf, encode_event_protobuf};
use prost::Message;

use crate::common::{all_models, bytes, VALID};

/// Lines that break one rule each of docs/contract.md "Input events", with the
/// reason that rule names (RejectReason docs). Every one has a protobuf
/// counterpart.
fn invalid_lines() -> Vec<(String, RejectReason)> {
    use RejectReason::*;
    let ok_touch = r#""event_id":"t-900","user_id":"cust-1900","timestamp":"2026-03-01T09:00:00Z","channel":"email""#;
    vec![
        (format!(r#"{{{ok_touch}}}"#), MissingType),
        (format!(r#"{{"type":null,{ok_touch}}}"#), MissingType),
        (r#"{"type":"touch","user_id":"cust-1900","timestamp":0,"channel":"email"}"#.into(), MissingEventId),
        (r#"{"type":"touch","event_id":"","user_id":"cust-1900","timestamp":0,"channel":"email"}"#.into(), InvalidEventId),
        (
            format!(r#"{{"type":"conversion","event_id":"{}","user_id":"cust-1900","timestamp":0}}"#, bytes(129)),
            InvalidEventId,
        ),
        (r#"{"type":"erase","event_id":"","user_id":"cust-1900","timestamp":0}"#.into(), InvalidEventId),
        (r#"{"type":"touch","event_id":"t-901","timestamp":0,"channel":"email"}"#.into(), MissingUserId),
        (r#"{"type":"erase","user_id":"","timestamp":0}"#.into(), InvalidUserId),
        (format!(r#"{{"type":"touch",{ok_touch},"user_key":"{}"}}"#, "ab".repeat(32)), InvalidUserId),
        (format!(r#"{{"type":"erase","user_id":"cust-1900","user_key":"{}","timestamp":0}}"#, "ab".repeat(32)), InvalidUserId),
        (
            format!(r#"{{"type":"touch","event_id":"t-902","user_id":"{}","timestamp":0,"channel":"email"}}"#, bytes(257)),
            InvalidUserId,
        ),
        (r#"{"type":"touch","event_id":"t-903","user_id":"cust-1900","channel":"email"}"#.into(), MissingTimestamp),
        (
            r#"{"type":"touch","event_id":"t-904","user_id":"cust-1900","timestamp":"2026-02-30T00:00:00Z","channel":"email"}"#
                .into(),
            InvalidTimestamp,
        ),
        // 10000-01-01T00:00:00Z in epoch ms: past year 9999.
        (
            r#"{"type":"touch","event_id":"t-905","user_id":"cust-1900","timestamp":253402300800000,"channel":"email"}"#.into(),
            InvalidTimestamp,
        ),
        (r#"{"type":"touch","event_id":"t-906","user_id":"cust-1900","timestamp":0}"#.into(), MissingChannel),
        (r#"{"type":"touch","event_id":"t-907","user_id":"cust-1900","timestamp":0,"channel":""}"#.into(), InvalidChannel),
        (
            r#"{"type":"touch","event_id":"t-908","user_id":"cust-1900","timestamp":0,"channel":"email","campaign":""}"#.into(),
            InvalidCampaign,
        ),
        (r#"{"type":"conversion","event_id":"c-909","user_id":"cust-1900","timestamp":0,"goal":""}"#.into(), InvalidGoal),
        (r#"{"type":"conversion","event_id":"c-910","user_id":"cust-1900","timestamp":0,"value":-3}"#.into(), InvalidValue),
        (
            r#"{"type":"conversion","event_id":"c-911","user_id":"cust-1900","timestamp":0,"value":-0.01}"#.into(),
            InvalidValue,
        ),
        (
            r#"{"type":"conversion","event_id":"c-912","user_id":"cust-1900","timestamp":0,"value":5,"currency":"eur"}"#
                .into(),
            InvalidCurrency,
        ),
        (
            r#"{"type":"conversion","event_id":"c-913","user_id":"cust-1900","timestamp":0,"currency":"EURO"}"#.into(),
            InvalidCurrency,
        ),
    ]
}

/// Lines the JSON contract rejects and that have no protobuf counterpart
/// (a JSON type the schema cannot carry): the helper refuses them rather
/// than turning them into something valid.
const UNREPRESENTABLE: &[(&str, RejectReason)] = &[
    (
        r#"{"type":"touch","event_id":"t-1","user_id":"u","timestamp":0,"channel":"email","consent":{"measurement":"no"}}"#,
        RejectReason::InvalidConsent,
    ),
    (
        r#"{"type":"touch","event_id":"t-1","user_id":"u","timestamp":0,"channel":"email","consent":true}"#,
        RejectReason::InvalidConsent,
    ),
    (r#"{"type":"click","event_id":"t-1","user_id":"u","timestamp":0,"channel":"email"}"#, RejectReason::InvalidType),
    (r#"{"type":"touch","event_id":"t-1","user_id":42,"timestamp":0,"channel":"email"}"#, RejectReason::InvalidUserId),
    (
        r#"{"type":"touch","event_id":"t-1","user_id":"u","timestamp":1.5,"channel":"email"}"#,
        RejectReason::InvalidTimestamp,
    ),
    (
        r#"{"type":"touch","event_id":"t-1","user_id":"u","timestamp":0,"channel":"email","interaction":"hover"}"#,
        RejectReason::InvalidInteraction,
    ),
    (
        r#"{"type":"conversion","event_id":"c-1","user_id":"u","timestamp":0,"value":"12.5"}"#,
        RejectReason::InvalidValue,
    ),
    (
        r#"{"type":"touch","type":"touch","event_id":"t-1","user_id":"u","timestamp":0,"channel":"email"}"#,
        RejectReason::InvalidJson,
    ),
    (r#"[1,2]"#, RejectReason::NotAnObject),
    (r#"{"type":"touch""#, RejectReason::InvalidJson),
];

fn all_lines() -> Vec<String> {
    let mut lines: Vec<String> = VALID.iter().map(|s| s.to_string()).collect();
    // Interleave the invalid ones: nothing valid may be lost because of them.
    for (i, (line, _)) in invalid_lines().into_iter().enumerate() {
        lines.insert((i * 3) % lines.len(), line);
    }
    lines
}

#[test]
fn each_event_decodes_alike_in_both_encodings() {
    for line in VALID {
        let json = parse_event(line.as_bytes()).unwrap_or_else(|r| panic!("valid line rejected: {r}\n{line}"));
        let bytes = encode_event_protobuf(line).unwrap_or_else(|e| panic!("{e}\n{line}"));
        let proto = decode_event_protobuf(&bytes, DEFAULT_MAX_EVENT_BYTES)
            .unwrap_or_else(|r| panic!("protobuf form rejected: {r}\n{line}"));
        assert_eq!(json, proto, "{line}");
    }
    for (line, reason) in invalid_lines() {
        let json = parse_event(line.as_bytes()).expect_err(&line);
        assert_eq!(json.reason, reason, "JSON: {line}");
        let bytes = encode_event_protobuf(&line).unwrap_or_else(|e| panic!("{e}\n{line}"));
        let proto = decode_event_protobuf(&bytes, DEFAULT_MAX_EVENT_BYTES).expect_err(&line);
        assert_eq!(proto.reason, reason, "protobuf: {line}");
        // One validator: the detail is the same text too.
        assert_eq!(proto.detail, json.detail, "{line}");
    }
}

#[test]
fn unrepresentable_json_is_refused_by_the_helper_and_rejected_by_the_contract() {
    for (line, reason) in UNREPRESENTABLE {
        assert!(encode_event_protobuf(line).is_err(), "helper accepted {line}");
        assert_eq!(parse_event(line.as_bytes()).expect_err(line).reason, *reason, "{line}");
    }
}

fn decode(msg: &pb::InputEvent) -> Result<Event, Rejection> {
    decode_event_protobuf(&msg.encode_to_vec(), DEFAULT_MAX_EVENT_BYTES)
}

fn base_touch() -> pb::InputEvent {
    pb::InputEvent {
        r#type: pb::EventType::Touch as i32,
        event_id: Some("t-950".into()),
        user_id: Some("cust-1950".into()),
        timestamp: Some(Timestamp::TimestampMs(1_772_359_200_000)),
        channel: Some("email".into()),
        ..Default::default()
    }
}

#[test]
fn protobuf_only_inputs_map_to_the_contract_reasons() {
    // An enum number this schema version does not define: the JSON
    // counterpart is a `type` outside touch / conversion / erase.
    let mut m = base_touch();
    m.r#type = 9;
    assert_eq!(decode(&m).unwrap_err().reason, RejectReason::InvalidType);

    let mut m = base_touch();
    m.interaction = 7;
    assert_eq!(decode(&m).unwrap_err().reason, RejectReason::InvalidInteraction);

    // Non-finite values cannot be written in JSON; the contract requires
    // "finite, >= 0" (docs/contract.md, "Input events"), so they are invalid_value, with the same
    // detail as a negative JSON value.
    let negative =
        parse_event(br#"{"type":"conversion","event_id":"c","user_id":"u","timestamp":0,"value":-1}"#).unwrap_err();
    for v in [f64::NAN, f64::INFINITY, f64::NEG_INFINITY] {
        let m = pb::InputEvent {
            r#type: pb::EventType::Conversion as i32,
            event_id: Some("c".into()),
            user_id: Some("u".into()),
            timestamp: Some(Timestamp::TimestampMs(0)),
            value: Some(v),
            ..Default::default()
        };
        assert_eq!(decode(&m).unwrap_err(), negative, "value {v}");
    }
    // ... and ignored on a touch, as the JSON parser ignores `value` there.
    let mut m = base_touch();
    m.value = Some(f64::NAN);
    assert_eq!(decode(&m).unwrap().value, None);

    // Integer timestamps out of range (years 1..=9999), both ends.
    for ms in [i64::MIN, i64::MAX, -62_135_596_800_001] {
        let mut m = base_touch();
        m.timestamp = Some(Timestamp::TimestampMs(ms));
        assert_eq!(decode(&m).unwrap_err().reason, RejectReason::InvalidTimestamp, "{ms}");
    }
    // The boundaries themselves are accepted (time_fmt MIN/MAX).
    for ms in [-62_135_596_800_000, 253_402_300_799_999] {
        let mut m = base_touch();
        m.timestamp = Some(Timestamp::TimestampMs(ms));
        assert_eq!(decode(&m).unwrap().timestamp_ms, ms);
    }
}

#[test]
fn size_limit_and_undecodable_bytes() {
    let bytes = encode_event_protobuf(VALID[0]).unwrap();
    let r = decode_event_protobuf(&bytes, bytes.len() - 1).unwrap_err();
    assert_eq!(r.reason, RejectReason::TooLarge);
    assert_eq!(r.detail, format!("event is {} bytes, at most {} allowed", bytes.len(), bytes.len() - 1));
    assert!(decode_event_protobuf(&bytes, bytes.len()).is_ok());

    // The limit applies to the protobuf bytes, not to the (larger) JSON
    // rendering used for validation.
    let json_len = VALID[0].len();
    assert!(json_len > bytes.len());

    // Truncated message: the last string field's length prefix runs past
    // the end.
    let r = decode_event_protobuf(&bytes[..bytes.len() - 1], DEFAULT_MAX_EVENT_BYTES).unwrap_err();
    assert_eq!(r.reason, RejectReason::InvalidJson);
    assert!(r.detail.starts_with("not a valid protobuf InputEvent:"), "{}", r.detail);

    // A string field that is not UTF-8 (proto3 strings must be UTF-8,
    // protobuf language guide "Scalar Value Types"): field 3 (user_id),
    // wire type 2, length 1, byte 0xFF.
    let r = decode_event_protobuf(&[0x08, 0x01, 0x1a, 0x01, 0xff], DEFAULT_MAX_EVENT_BYTES).unwrap_err();
    assert_eq!(r.reason, RejectReason::InvalidJson);
    assert!(r.detail.starts_with("not a valid protobuf InputEvent:"), "{}", r.detail);

    // No bytes at all is a valid empty message: no `type`.
    assert_eq!(decode_event_protobuf(&[], DEFAULT_MAX_EVENT_BYTES).unwrap_err().reason, RejectReason::MissingType);
}

/// The protobuf side of the replay: the engine's replay driver, fed with
/// decoded protobuf events (deduplicated in input order, sorted by time
/// and line) instead of parsed lines.
fn replay_events(events: &[(u64, Event)], p: &Pseudonymizer) -> (Vec<CreditRow>, Vec<PathRow>, u64) {
    let mut seen = FirstSeen::default();
    let mut duplicates = 0;
    let mut kept: Vec<&(u64, Event)> = Vec::new();
    for e in events {
        if seen.first(&e.1) {
            kept.push(e);
        } else {
            duplicates += 1;
        }
    }
    kept.sort_by_key(|(n, ev)| (ev.timestamp_ms, *n));
    let (mut rows, mut paths) = (Vec::new(), Vec::new());
    two_pass::run::<_, std::convert::Infallible, _, _, _>(
        &all_models(),
        Rules::default(),
        |_| Ok(MemStore::default()),
        |_, apply| {
            for (n, ev) in &kept {
                apply(journey_event(ev, p, *n))?;
            }
            Ok(())
        },
        |e, models| {
            let (c, path) = effect_rows(e, models);
            rows.extend(c);
            paths.extend(path);
            Ok(())
        },
    )
    .unwrap_or_else(|e| match e {});
    (rows, paths, duplicates)
}

#[test]
fn same_events_in_either_encoding_give_identical_credit() {
    let lines = all_lines();
    let refs: Vec<&str> = lines.iter().map(String::as_str).collect();
    let p = Pseudonymizer::new(b"example-shop-demo-key");

    // JSON: the engine's own replay, two passes (data-driven models fitted
    // on the first pass's paths).
    let json = replay_lines(&refs, Rules::default(), &p, &all_models());

    // Protobuf: every line converted and decoded, then replayed the same
    // way (duplicates, order, two passes).
    let mut events = Vec::new();
    let mut rejected = Vec::new();
    for (i, line) in lines.iter().enumerate() {
        let n = i as u64 + 1;
        let bytes = encode_event_protobuf(line).unwrap_or_else(|e| panic!("{e}\n{line}"));
        match decode_event_protobuf(&bytes, DEFAULT_MAX_EVENT_BYTES) {
            // Dropped unread, as replay does (contract: Input events, Consent).
            Ok(ev) if ev.without_consent() => {}
            Ok(ev) => events.push((n, ev)),
            Err(r) => rejected.push((n, r)),
        }
    }
    let (rows, paths, duplicates) = replay_events(&events, &p);

    // Same rejections, same lines, same reasons and details.
    assert_eq!(rejected, json.rejected);
    assert_eq!(rejected.len(), invalid_lines().len());
    assert_eq!(duplicates, json.duplicates);
    assert_eq!(duplicates, 1);
    assert_eq!(paths, json.paths);
    assert_eq!(rows.len(), json.rows.len());
    for (a, b) in rows.iter().zip(&json.rows) {
        assert_eq!(a, b);
    }

    // The input really exercised the engine: 6 conversions x 7 models, a
    // 3-touch path (c-001), an unattributed row (c-301), a non-converting
    // path (cust-1003) and data-driven rows carrying a model_version.
    let conversions: std::collections::BTreeSet<&str> = rows.iter().map(|r| r.conversion_id.as_str()).collect();
    assert_eq!(conversions.into_iter().collect::<Vec<_>>(), ["c-001", "c-101", "c-102", "c-301", "c-401", "c-701"]);
    assert!(rows.iter().any(|r| r.conversion_id == "c-001" && r.path_length == 3));
    assert!(rows.iter().any(|r| r.conversion_id == "c-301" && r.channel == "unattributed"));
    assert!(paths.iter().any(|p| !p.converted));
    assert!(rows.iter().any(|r| r.model == "markov" && r.model_version.is_some()));
    assert_eq!(rows.iter().filter(|r| r.model == "linear").count(), 3 + 3 + 1 + 1 + 1 + 1);
    // t-701 had no consent to measurement: c-701 credits only t-702.
    assert!(rows.iter().filter(|r| r.conversion_id == "c-701").all(|r| r.touch_event_id.as_deref() == Some("t-702")));
    // The erase removed t-401: c-401 credits only t-402.
    assert!(rows.iter().filter(|r| r.conversion_id == "c-401").all(|r| r.touch_event_id.as_deref() == Some("t-402")));
}

mod generated {
    //! Generated events: every combination the pools allow, valid or not,
    //! must be accepted or rejected alike in both encodings.

    use super::*;
    use proptest::prelude::*;

    /// One field of a generated event: `None` = absent, else its JSON text.
    fn field(pool: &'static [&'static str]) -> impl Strategy<Value = Option<&'static str>> {
        proptest::option::weighted(0.8, proptest::sample::select(pool))
    }

    const E129: &str = "\"eeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeeee\"";

    prop_compose! {
        fn event_line()(
            kind in field(&["\"touch\"", "\"conversion\"", "\"erase\"", "null"]),
            event_id in field(&["\"t-1\"", "\"\"", "\"\\u00e9t\u{e9}\"", E129, "null"]),
            user_id in field(&["\"cust-1\"", "\"\"", "\"d\u{e9}vice\"", "null"]),
            timestamp in field(&[
                "\"2026-03-01T10:00:00Z\"", "\"2026-03-01T12:00:00.123456+02:00\"", "\"2026-02-30T00:00:00Z\"",
                "\"yesterday\"", "\"\"", "0", "-1", "1772359200000", "253402300800000", "-9223372036854775808", "null",
            ]),
            channel in field(&["\"email\"", "\"\"", "\"paid_search\"", "null"]),
            campaign in field(&["\"spring-tents\"", "\"\"", "null"]),
            interaction in field(&["\"click\"", "\"view\"", "null"]),
            goal in field(&["\"purchase\"", "\"\"", "null"]),
            value in field(&["0", "12.5", "-0.01", "-3", "1e308", "18446744073709551615", "-0", "null"]),
            currency in field(&["\"EUR\"", "\"eur\"", "\"EURO\"", "\"\"", "null"]),
            extra in any::<bool>(),
        ) -> String {
            let mut parts = Vec::new();
            for (k, v) in [
                ("type", kind), ("event_id", event_id), ("user_id", user_id), ("timestamp", timestamp),
                ("channel", channel), ("campaign", campaign), ("interaction", interaction), ("goal", goal),
                ("value", value), ("currency", currency),
            ] {
                if let Some(v) = v {
                    parts.push(format!("\"{k}\":{v}"));
                }
            }
            if extra {
                parts.push("\"note\":[true,{\"a\":1}]".to_string());
            }
            format!("{{{}}}", parts.join(","))
        }
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(2000))]
        #[test]
        fn generated_events_decode_alike(line in event_line()) {
            let json = parse_event(line.as_bytes());
            let bytes = encode_event_protobuf(&line).map_err(|e| TestCaseError::fail(format!("{e}: {line}")))?;
            let proto = decode_event_protobuf(&bytes, DEFAULT_MAX_EVENT_BYTES);
            prop_assert_eq!(proto, json, "{}", line);
        }
    }
}
