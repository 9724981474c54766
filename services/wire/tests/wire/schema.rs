//! The .proto and the serde types stay in step, and field numbers never
//! change.
//! Check values: the field numbers of proto/apportion/v1/apportion.proto as
//! first published, and the serde field order of the row types.

use std::fmt;

use apportion_engine::contract::{DeadLetter, Interaction, ModelId, RejectReason, Timestamp, UserKey};
use apportion_engine::{CreditRow, PathRow};
use apportion_wire::FILE_DESCRIPTOR_SET;
use prost::Message;
use prost_types::field_descriptor_proto::{Label, Type};
use prost_types::{DescriptorProto, FileDescriptorProto, FileDescriptorSet};
use serde::de::{Deserialize, Deserializer, IgnoredAny, MapAccess, Visitor};
use serde::Serialize;
use serde_json::Value;

fn schema_file() -> FileDescriptorProto {
    let set = FileDescriptorSet::decode(FILE_DESCRIPTOR_SET).expect("descriptor set decodes");
    let file = set
        .file
        .into_iter()
        .find(|f| f.name() == "apportion/v1/apportion.proto")
        .expect("apportion/v1/apportion.proto in the descriptor set");
    assert_eq!(file.package(), "apportion.v1");
    assert_eq!(file.syntax(), "proto3");
    file
}

fn message(file: &FileDescriptorProto, name: &str) -> DescriptorProto {
    file.message_type.iter().find(|m| m.name() == name).unwrap_or_else(|| panic!("message {name}")).clone()
}

/// Keys of a serialized value in the order serde wrote them (a
/// `serde_json::Value` map would sort them).
struct Keys(Vec<String>);

impl<'de> Deserialize<'de> for Keys {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Keys;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a JSON object")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Keys, A::Error> {
                let mut keys = Vec::new();
                while let Some((k, IgnoredAny)) = map.next_entry::<String, IgnoredAny>()? {
                    keys.push(k);
                }
                Ok(Keys(keys))
            }
        }
        d.deserialize_map(V)
    }
}

fn serde_keys<T: Serialize>(v: &T) -> Vec<String> {
    let text = serde_json::to_string(v).expect("serializes");
    serde_json::from_str::<Keys>(&text).expect("an object").0
}

/// Checks one message against a serde type, given a sample with every
/// `Option` set (`full`) and one with every `Option` empty (`empty`):
/// - the field names are the serde names, in the same order;
/// - a field is proto3 `optional` exactly when serde writes null for it;
/// - JSON strings are `string` fields, booleans `bool`, arrays `repeated`,
///   integers an integer type and fractional numbers `double`.
fn check_in_step<T: Serialize>(file: &FileDescriptorProto, name: &str, full: &T, empty: &T) {
    let m = message(file, name);
    let proto_names: Vec<String> = m.field.iter().map(|f| f.name().to_string()).collect();
    assert_eq!(proto_names, serde_keys(full), "{name}: .proto fields vs serde fields (name and order)");
    assert!(m.oneof_decl.iter().all(|o| o.name().starts_with('_')), "{name}: output messages have no oneof");

    let full = serde_json::to_value(full).unwrap();
    let empty = serde_json::to_value(empty).unwrap();
    for f in &m.field {
        let key = f.name();
        let nullable = empty[key].is_null();
        assert_eq!(f.proto3_optional.unwrap_or(false), nullable, "{name}.{key}: `optional` iff nullable in JSON");
        assert!(!full[key].is_null(), "{name}.{key}: the full sample must set every field");
        let ok = match &full[key] {
            Value::String(_) => f.r#type() == Type::String && f.label() != Label::Repeated,
            Value::Bool(_) => f.r#type() == Type::Bool,
            Value::Array(items) => {
                f.label() == Label::Repeated && items.iter().all(Value::is_string) && f.r#type() == Type::String
            }
            Value::Number(n) if n.is_f64() => f.r#type() == Type::Double,
            Value::Number(n) if n.is_u64() && n.as_u64().unwrap() <= u32::MAX as u64 => {
                matches!(f.r#type(), Type::Uint32 | Type::Int32 | Type::Uint64 | Type::Int64)
            }
            Value::Number(_) => matches!(f.r#type(), Type::Int32 | Type::Int64),
            other => panic!("{name}.{key}: unexpected JSON {other}"),
        };
        assert!(ok, "{name}.{key}: JSON {} vs protobuf {:?}", full[key], f.r#type());
    }
}

pub fn full_credit() -> CreditRow {
    CreditRow {
        credit_id: "0f1e2d3c4b5a69788796a5b4c3d2e1f0".into(),
        conversion_id: "c-001".into(),
        user_key: UserKey([0x9a; 32]),
        model: ModelId::Markov,
        model_version: Some("m1-3f2a".into()),
        goal: "purchase".into(),
        touch_event_id: Some("t-001".into()),
        channel: "paid_search".into(),
        campaign: Some("spring-tents".into()),
        interaction: Some(Interaction::Click),
        position: 1,
        path_length: 3,
        // 2026-03-01T09:00:00.000Z and 2026-03-03T12:00:00.000Z.
        touch_timestamp: Some(Timestamp(1_772_355_600_000)),
        conversion_timestamp: Timestamp(1_772_539_200_000),
        credit: 0.25,
        credited_value: Some(47.375),
        currency: Some("EUR".into()),
    }
}

pub fn empty_credit() -> CreditRow {
    CreditRow {
        model_version: None,
        touch_event_id: None,
        campaign: None,
        interaction: None,
        touch_timestamp: None,
        credited_value: None,
        currency: None,
        ..full_credit()
    }
}

pub fn full_path() -> PathRow {
    PathRow {
        path_id: "c:c-001".into(),
        user_key: UserKey([0x9a; 32]),
        converted: true,
        conversion_id: Some("c-001".into()),
        goal: Some("purchase".into()),
        channels: vec!["paid_search".into(), "email".into(), "social".into()],
        touch_count: 3,
        // 2026-03-01T09:00:00.000Z and 2026-03-03T07:15:00.250Z.
        first_touch_timestamp: Timestamp(1_772_355_600_000),
        last_touch_timestamp: Timestamp(1_772_522_100_250),
    }
}

pub fn empty_path() -> PathRow {
    PathRow { conversion_id: None, goal: None, converted: false, path_id: "n:00ff".into(), ..full_path() }
}

pub fn full_dead_letter() -> DeadLetter {
    DeadLetter {
        reason: RejectReason::InvalidCurrency,
        detail: "field `currency` must be an ISO 4217 code of three capital letters, got \"eur\"".into(),
        source: "shop.events".into(),
        partition: Some(3),
        offset: Some(4_200_000_000_123),
        event_id: Some("c-912".into()),
        // 2026-03-03T12:00:01.000Z.
        received_at: Timestamp(1_772_539_201_000),
    }
}

pub fn empty_dead_letter() -> DeadLetter {
    DeadLetter { partition: None, offset: None, event_id: None, source: "http".into(), ..full_dead_letter() }
}

#[test]
fn credit_row_message_matches_serde_type() {
    check_in_step(&schema_file(), "CreditRow", &full_credit(), &empty_credit());
}

#[test]
fn path_row_message_matches_serde_type() {
    check_in_step(&schema_file(), "PathRow", &full_path(), &empty_path());
}

#[test]
fn dead_letter_message_matches_serde_type() {
    check_in_step(&schema_file(), "DeadLetter", &full_dead_letter(), &empty_dead_letter());
}

#[test]
fn input_event_covers_every_contract_field() {
    // The input fields of docs/contract.md, "Input events".
    const CONTRACT: [&str; 12] = [
        "type",
        "event_id",
        "user_id",
        "timestamp",
        "channel",
        "campaign",
        "interaction",
        "goal",
        "value",
        "currency",
        "user_key",
        "consent",
    ];
    let file = schema_file();
    let m = message(&file, "InputEvent");
    // A contract field is a protobuf field of that name, or (timestamp) a
    // real oneof of that name whose members are its alternative forms.
    let real_oneofs: Vec<(i32, &str)> = m
        .oneof_decl
        .iter()
        .enumerate()
        .filter(|(_, o)| !o.name().starts_with('_'))
        .map(|(i, o)| (i as i32, o.name()))
        .collect();
    let mut covered = Vec::new();
    for f in &m.field {
        let real_oneof = if f.proto3_optional() {
            None
        } else {
            f.oneof_index.and_then(|i| real_oneofs.iter().find(|(j, _)| *j == i))
        };
        match real_oneof {
            Some((_, oneof)) => {
                assert!(f.name().starts_with(&format!("{oneof}_")), "{} in oneof {oneof}", f.name());
                if !covered.contains(&oneof.to_string()) {
                    covered.push(oneof.to_string());
                }
            }
            None => covered.push(f.name().to_string()),
        }
    }
    assert_eq!(covered, CONTRACT, "InputEvent fields vs the contract's input fields (and order)");

    // Every field but `type` and `interaction` (enums with an UNSPECIFIED
    // zero) and the timestamp oneof is `optional`: absent and empty differ
    // in the contract (missing_* vs invalid_*).
    for f in &m.field {
        let expect_optional = !matches!(f.name(), "type" | "interaction" | "timestamp_rfc3339" | "timestamp_ms");
        assert_eq!(f.proto3_optional(), expect_optional, "InputEvent.{}", f.name());
    }
    let timestamp: Vec<(&str, Type)> =
        m.field.iter().filter(|f| f.name().starts_with("timestamp")).map(|f| (f.name(), f.r#type())).collect();
    assert_eq!(timestamp, [("timestamp_rfc3339", Type::String), ("timestamp_ms", Type::Int64)]);

    // The enums spell the contract's closed sets, with 0 = not set.
    let values = |name: &str| -> Vec<(String, i32)> {
        let e = file.enum_type.iter().find(|e| e.name() == name).unwrap_or_else(|| panic!("enum {name}"));
        e.value.iter().map(|v| (v.name().to_string(), v.number())).collect()
    };
    let own = |v: &[(&str, i32)]| v.iter().map(|(n, i)| (n.to_string(), *i)).collect::<Vec<_>>();
    assert_eq!(
        values("EventType"),
        own(&[
            ("EVENT_TYPE_UNSPECIFIED", 0),
            ("EVENT_TYPE_TOUCH", 1),
            ("EVENT_TYPE_CONVERSION", 2),
            ("EVENT_TYPE_ERASE", 3)
        ])
    );
    assert_eq!(
        values("Interaction"),
        own(&[("INTERACTION_UNSPECIFIED", 0), ("INTERACTION_CLICK", 1), ("INTERACTION_VIEW", 2)])
    );
}

/// Field numbers as published in apportion.v1. They are part of the wire
/// contract: never change a line here; add new fields with new numbers.
const PUBLISHED_V1: &[(&str, &[(&str, i32)])] = &[
    (
        "InputEvent",
        &[
            ("type", 1),
            ("event_id", 2),
            ("user_id", 3),
            ("timestamp_rfc3339", 4),
            ("timestamp_ms", 5),
            ("channel", 6),
            ("campaign", 7),
            ("interaction", 8),
            ("goal", 9),
            ("value", 10),
            ("currency", 11),
            ("user_key", 12),
            ("consent", 13),
        ],
    ),
    ("Consent", &[("measurement", 1)]),
    (
        "CreditRow",
        &[
            ("credit_id", 1),
            ("conversion_id", 2),
            ("user_key", 3),
            ("model", 4),
            ("model_version", 5),
            ("goal", 6),
            ("touch_event_id", 7),
            ("channel", 8),
            ("campaign", 9),
            ("interaction", 10),
            ("position", 11),
            ("path_length", 12),
            ("touch_timestamp", 13),
            ("conversion_timestamp", 14),
            ("credit", 15),
            ("credited_value", 16),
            ("currency", 17),
        ],
    ),
    (
        "PathRow",
        &[
            ("path_id", 1),
            ("user_key", 2),
            ("converted", 3),
            ("conversion_id", 4),
            ("goal", 5),
            ("channels", 6),
            ("touch_count", 7),
            ("first_touch_timestamp", 8),
            ("last_touch_timestamp", 9),
        ],
    ),
    (
        "DeadLetter",
        &[
            ("reason", 1),
            ("detail", 2),
            ("source", 3),
            ("partition", 4),
            ("offset", 5),
            ("event_id", 6),
            ("received_at", 7),
        ],
    ),
];

#[test]
fn published_field_numbers_never_change() {
    let file = schema_file();
    for (name, published) in PUBLISHED_V1 {
        let m = message(&file, name);
        for (field, number) in published.iter() {
            let f = m
                .field
                .iter()
                .find(|f| f.name() == *field)
                .unwrap_or_else(|| panic!("{name}.{field} was removed: mark its number reserved instead"));
            assert_eq!(f.number(), *number, "{name}.{field} changed its number");
        }
        // New fields are fine, as long as they do not reuse a number.
        for f in &m.field {
            if let Some((old, _)) = published.iter().find(|(n, num)| *num == f.number() && *n != f.name()) {
                panic!("{name}.{} reuses number {} of published field {old}", f.name(), f.number());
            }
        }
    }
}
