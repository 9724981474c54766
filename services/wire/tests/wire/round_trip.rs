//! encode then decode gives back the original row.
//! Check values: the rows themselves (a round trip needs no other source).

use apportion_engine::contract::time::{MAX_TIMESTAMP_MS, MIN_TIMESTAMP_MS};
use apportion_engine::contract::{DeadLetter, Interaction, ModelId, RejectReason, Timestamp, UserKey};
use apportion_engine::replay::replay_lines;
use apportion_engine::{CreditRow, PathRow, Pseudonymizer, Rules};
use apportion_wire::{
    decode_credit_protobuf, decode_dead_letter_protobuf, decode_path_protobuf, encode_credit_protobuf,
    encode_dead_letter_protobuf, encode_path_protobuf,
};
use proptest::prelude::*;

use crate::common::{all_models, VALID};
use crate::schema::{empty_credit, empty_dead_letter, empty_path, full_credit, full_dead_letter, full_path};

#[test]
fn rows_of_a_real_replay_round_trip() {
    let p = Pseudonymizer::new(b"example-shop-demo-key");
    let r = replay_lines(VALID, Rules::default(), &p, &all_models());
    assert!(r.rows.len() > 30 && r.paths.len() > 3, "{} rows, {} paths", r.rows.len(), r.paths.len());
    for row in &r.rows {
        assert_eq!(&decode_credit_protobuf(&encode_credit_protobuf(row)).unwrap(), row);
    }
    for path in &r.paths {
        assert_eq!(&decode_path_protobuf(&encode_path_protobuf(path)).unwrap(), path);
    }
}

#[test]
fn samples_round_trip() {
    for row in [full_credit(), empty_credit()] {
        assert_eq!(decode_credit_protobuf(&encode_credit_protobuf(&row)).unwrap(), row);
    }
    for path in [full_path(), empty_path(), PathRow { channels: vec![], ..empty_path() }] {
        assert_eq!(decode_path_protobuf(&encode_path_protobuf(&path)).unwrap(), path);
    }
    for d in [full_dead_letter(), empty_dead_letter()] {
        assert_eq!(decode_dead_letter_protobuf(&encode_dead_letter_protobuf(&d)).unwrap(), d);
    }
    // Optional strings that are set but empty stay Some(""), not None.
    let row = CreditRow { campaign: Some(String::new()), model_version: Some(String::new()), ..full_credit() };
    assert_eq!(decode_credit_protobuf(&encode_credit_protobuf(&row)).unwrap(), row);
}

#[test]
fn garbage_is_an_error_not_a_panic() {
    // A LEN field whose length runs past the end of the input.
    let truncated = [0x0a, 0x05, b'a'];
    assert!(decode_credit_protobuf(&truncated).is_err());
    assert!(decode_path_protobuf(&truncated).is_err());
    assert!(decode_dead_letter_protobuf(&truncated).is_err());
}

fn key() -> impl Strategy<Value = UserKey> {
    any::<[u8; 32]>().prop_map(UserKey)
}

fn model() -> impl Strategy<Value = ModelId> {
    proptest::sample::select(ModelId::ALL.to_vec())
}

fn interaction() -> impl Strategy<Value = Option<Interaction>> {
    proptest::option::of(proptest::sample::select(vec![Interaction::Click, Interaction::View]))
}

fn ts() -> impl Strategy<Value = Timestamp> {
    (MIN_TIMESTAMP_MS..=MAX_TIMESTAMP_MS).prop_map(Timestamp)
}

fn reason() -> impl Strategy<Value = RejectReason> {
    proptest::sample::select(RejectReason::ALL.to_vec())
}

fn opt_s() -> impl Strategy<Value = Option<String>> {
    proptest::option::of(any::<String>())
}

/// Any f64 except NaN (NaN != NaN would make equality meaningless).
fn num() -> impl Strategy<Value = f64> {
    any::<f64>().prop_filter("not NaN", |v| !v.is_nan())
}

prop_compose! {
    fn credit_row()(
        a in (any::<String>(), any::<String>(), key(), model(), opt_s(), any::<String>()),
        b in (opt_s(), any::<String>(), opt_s(), interaction(), any::<u32>(), any::<u32>()),
        c in (proptest::option::of(ts()), ts(), num(), proptest::option::of(num()), opt_s()),
    ) -> CreditRow {
        CreditRow {
            credit_id: a.0, conversion_id: a.1, user_key: a.2, model: a.3, model_version: a.4, goal: a.5,
            touch_event_id: b.0, channel: b.1, campaign: b.2, interaction: b.3, position: b.4, path_length: b.5,
            touch_timestamp: c.0, conversion_timestamp: c.1, credit: c.2, credited_value: c.3, currency: c.4,
        }
    }
}

prop_compose! {
    fn path_row()(
        a in (any::<String>(), key(), any::<bool>(), opt_s(), opt_s()),
        b in (proptest::collection::vec(any::<String>(), 0..8), any::<u32>(), ts(), ts()),
    ) -> PathRow {
        PathRow {
            path_id: a.0, user_key: a.1, converted: a.2, conversion_id: a.3, goal: a.4,
            channels: b.0, touch_count: b.1, first_touch_timestamp: b.2, last_touch_timestamp: b.3,
        }
    }
}

prop_compose! {
    fn dead_letter()(
        a in (reason(), any::<String>(), any::<String>()),
        b in (proptest::option::of(any::<i32>()), proptest::option::of(any::<i64>()), opt_s(), ts()),
    ) -> DeadLetter {
        DeadLetter { reason: a.0, detail: a.1, source: a.2, partition: b.0, offset: b.1, event_id: b.2, received_at: b.3 }
    }
}

proptest! {
    #[test]
    fn any_credit_row_round_trips(row in credit_row()) {
        prop_assert_eq!(decode_credit_protobuf(&encode_credit_protobuf(&row)).unwrap(), row);
    }

    #[test]
    fn any_path_row_round_trips(row in path_row()) {
        prop_assert_eq!(decode_path_protobuf(&encode_path_protobuf(&row)).unwrap(), row);
    }

    #[test]
    fn any_dead_letter_round_trips(d in dead_letter()) {
        prop_assert_eq!(decode_dead_letter_protobuf(&encode_dead_letter_protobuf(&d)).unwrap(), d);
    }
}
