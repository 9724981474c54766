//! Payload encodings of topics: JSON (default) or protobuf (proto/).

use apportion_engine::{CreditRow, Event, EventKind, PathRow, Rejection};
use apportion_sinks::DeadLetter;

use crate::config::Format;

/// Decodes a protobuf input event and validates it with the JSON rules.
pub fn decode_event(bytes: &[u8], max_bytes: usize) -> Result<Event, Rejection> {
    apportion_wire::decode_event_protobuf(bytes, max_bytes)
}

/// Encodes a credit row.
pub fn encode_credit(format: Format, r: &CreditRow) -> Vec<u8> {
    match format {
        Format::Json => serde_json::to_vec(r).expect("rows serialize"),
        Format::Protobuf => apportion_wire::encode_credit_protobuf(r),
    }
}

/// Encodes a path row.
pub fn encode_path(format: Format, r: &PathRow) -> Vec<u8> {
    match format {
        Format::Json => serde_json::to_vec(r).expect("rows serialize"),
        Format::Protobuf => apportion_wire::encode_path_protobuf(r),
    }
}

/// Encodes a dead letter.
pub fn encode_dead_letter(format: Format, d: &DeadLetter) -> Vec<u8> {
    match format {
        Format::Json => serde_json::to_vec(d).expect("rows serialize"),
        Format::Protobuf => apportion_wire::encode_dead_letter_protobuf(d),
    }
}

/// The internal repartitioned form of an event: the contract's JSON with the
/// pseudonymous key in place of the raw `user_id` and the time in epoch ms.
pub fn event_to_keyed_json(ev: &Event, user_key_hex: &str) -> String {
    let mut m = serde_json::Map::new();
    m.insert("type".into(), ev.kind.as_str().into());
    if !ev.event_id.is_empty() {
        m.insert("event_id".into(), ev.event_id.clone().into());
    }
    m.insert("user_id".into(), user_key_hex.into());
    m.insert("timestamp".into(), ev.timestamp_ms.into());
    match ev.kind {
        EventKind::Touch => {
            m.insert("channel".into(), ev.channel.clone().into());
            if let Some(c) = &ev.campaign {
                m.insert("campaign".into(), c.clone().into());
            }
            m.insert("interaction".into(), ev.interaction.as_str().into());
        }
        EventKind::Conversion => {
            m.insert("goal".into(), ev.goal.clone().into());
            if let Some(v) = ev.value {
                m.insert("value".into(), serde_json::json!(v));
            }
            if let Some(c) = &ev.currency {
                m.insert("currency".into(), c.clone().into());
            }
        }
        EventKind::Erase => {}
    }
    serde_json::Value::Object(m).to_string()
}
