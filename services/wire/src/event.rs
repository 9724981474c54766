//! Input events in protobuf: decoding (validated by the engine's parser)
//! and a JSON-to-protobuf helper for tests and tools.

use apportion_contract::event::parse_event_limited;
use apportion_contract::{Event, EventKind, RejectReason, Rejection};
use prost::Message;
use serde::Deserialize;
use serde_json::{Map, Number, Value};

use crate::pb::{input_event::Timestamp, EventType, InputEvent, Interaction};

/// Decodes one protobuf `apportion.v1.InputEvent` and validates it with
/// exactly the rules and reasons of the JSON contract.
///
/// - More than `max_bytes` bytes: [`RejectReason::TooLarge`] (checked on the
///   protobuf bytes, before decoding).
/// - Not a decodable `InputEvent` (truncated, wrong wire type, a string
///   field that is not UTF-8, ...): [`RejectReason::InvalidJson`] with a
///   detail starting `not a valid protobuf InputEvent:`. The engine has no
///   dedicated reason for this yet; `invalid_json` is the nearest existing
///   one ("the bytes are not an event of the expected encoding").
/// - Otherwise the message is rendered as its JSON object form
///   ([`to_contract_json`]) and validated by
///   [`apportion_contract::event::parse_event_limited`], so every contract
///   rule (required fields, lengths, timestamp range, currency shape, ...)
///   gives the same reason as for the same event in JSON.
pub fn decode_event_protobuf(bytes: &[u8], max_bytes: usize) -> Result<Event, Rejection> {
    if bytes.len() > max_bytes {
        return Err(Rejection::new(
            RejectReason::TooLarge,
            format!("event is {} bytes, at most {max_bytes} allowed", bytes.len()),
        ));
    }
    let msg = InputEvent::decode(bytes)
        .map_err(|e| Rejection::new(RejectReason::InvalidJson, format!("not a valid protobuf InputEvent: {e}")))?;
    // The size limit was applied to what arrived; the JSON rendering is
    // larger (keys, quotes) and must not be rejected for that.
    parse_event_limited(&to_contract_json(&msg), usize::MAX)
}

/// What can be read of a rejected protobuf event for its dead letter and
/// metric labels: its kind and its `event_id` (at most 128 bytes), when the
/// bytes decode as an `InputEvent` at all. Never the user id.
pub fn sniff_protobuf(bytes: &[u8]) -> (Option<EventKind>, Option<String>) {
    let Ok(msg) = InputEvent::decode(bytes) else { return (None, None) };
    let kind = match EventType::try_from(msg.r#type) {
        Ok(EventType::Touch) => Some(EventKind::Touch),
        Ok(EventType::Conversion) => Some(EventKind::Conversion),
        Ok(EventType::Erase) => Some(EventKind::Erase),
        _ => None,
    };
    let id = msg.event_id.filter(|id| id.len() <= apportion_contract::event::MAX_EVENT_ID_BYTES);
    (kind, id)
}

/// Text put in place of an enum number this schema version does not know,
/// so that the JSON validator rejects it with its usual reason
/// (`invalid_type` / `invalid_interaction`).
fn unknown_enum(n: i32) -> Value {
    Value::String(format!("<unknown protobuf enum value {n}>"))
}

/// Renders an `InputEvent` as the JSON object of the input contract (one
/// line, UTF-8). Unset fields are left out, as the JSON form allows.
///
/// One value has no JSON spelling: a non-finite `value` (NaN, infinity).
/// It is written as `-1.0`, which the contract rejects with the same reason
/// and detail (`invalid_value`, "must be a finite number >= 0") at the same
/// point of validation.
pub fn to_contract_json(msg: &InputEvent) -> Vec<u8> {
    let mut m = Map::new();
    match EventType::try_from(msg.r#type) {
        Ok(EventType::Unspecified) => {}
        Ok(EventType::Touch) => {
            m.insert("type".into(), "touch".into());
        }
        Ok(EventType::Conversion) => {
            m.insert("type".into(), "conversion".into());
        }
        Ok(EventType::Erase) => {
            m.insert("type".into(), "erase".into());
        }
        Err(_) => {
            m.insert("type".into(), unknown_enum(msg.r#type));
        }
    }
    let mut put = |key: &str, v: &Option<String>| {
        if let Some(s) = v {
            m.insert(key.into(), Value::String(s.clone()));
        }
    };
    put("event_id", &msg.event_id);
    put("user_id", &msg.user_id);
    put("user_key", &msg.user_key);
    put("channel", &msg.channel);
    put("campaign", &msg.campaign);
    put("goal", &msg.goal);
    put("currency", &msg.currency);
    match &msg.timestamp {
        None => {}
        Some(Timestamp::TimestampRfc3339(s)) => {
            m.insert("timestamp".into(), Value::String(s.clone()));
        }
        Some(Timestamp::TimestampMs(ms)) => {
            m.insert("timestamp".into(), Value::from(*ms));
        }
    }
    match Interaction::try_from(msg.interaction) {
        Ok(Interaction::Unspecified) => {}
        Ok(Interaction::Click) => {
            m.insert("interaction".into(), "click".into());
        }
        Ok(Interaction::View) => {
            m.insert("interaction".into(), "view".into());
        }
        Err(_) => {
            m.insert("interaction".into(), unknown_enum(msg.interaction));
        }
    }
    if let Some(c) = &msg.consent {
        let mut o = Map::new();
        if let Some(b) = c.measurement {
            o.insert("measurement".into(), Value::Bool(b));
        }
        m.insert("consent".into(), Value::Object(o));
    }
    if let Some(v) = msg.value {
        let n = Number::from_f64(v).unwrap_or_else(|| Number::from_f64(-1.0).expect("finite"));
        m.insert("value".into(), Value::Number(n));
    }
    serde_json::to_vec(&Value::Object(m)).expect("a JSON map of strings and numbers serializes")
}

/// The contract's fields of a JSON event, each kept as it came. A derived
/// struct (rather than a `Value` map) rejects a duplicated key, as the
/// engine's parser does; unknown keys are ignored.
#[derive(Deserialize)]
struct JsonFields {
    #[serde(rename = "type")]
    kind: Option<Value>,
    event_id: Option<Value>,
    user_id: Option<Value>,
    user_key: Option<Value>,
    consent: Option<Value>,
    timestamp: Option<Value>,
    channel: Option<Value>,
    campaign: Option<Value>,
    interaction: Option<Value>,
    goal: Option<Value>,
    value: Option<Value>,
    currency: Option<Value>,
}

fn not_representable(field: &str, v: &Value) -> String {
    format!("field `{field}` = {v} has no protobuf InputEvent representation")
}

fn opt_string(field: &str, v: Option<Value>) -> Result<Option<String>, String> {
    match v {
        None | Some(Value::Null) => Ok(None),
        Some(Value::String(s)) => Ok(Some(s)),
        Some(other) => Err(not_representable(field, &other)),
    }
}

/// Converts one JSON event line (the input contract) into the bytes of the
/// equivalent protobuf `InputEvent`: a helper for tests and tools.
///
/// The line need not be a *valid* event: an event that breaks a contract
/// rule (missing field, empty string, negative value, bad currency, ...) is
/// converted as it is, so that decoding the result gives the same
/// rejection. It fails only when the JSON has no protobuf counterpart: not
/// a JSON object, a duplicated key, a field of the wrong JSON type (e.g. a
/// numeric `user_id`), a `type` or `interaction` outside the enums, or a
/// non-integer `timestamp`.
pub fn encode_event_protobuf(json_line: &str) -> Result<Vec<u8>, String> {
    let trimmed = json_line.trim();
    if !trimmed.starts_with('{') {
        return Err("not a JSON object".to_string());
    }
    let f: JsonFields = serde_json::from_str(trimmed).map_err(|e| format!("not a valid JSON event object: {e}"))?;
    let kind = match f.kind {
        None | Some(Value::Null) => EventType::Unspecified,
        Some(Value::String(s)) if s == "touch" => EventType::Touch,
        Some(Value::String(s)) if s == "conversion" => EventType::Conversion,
        Some(Value::String(s)) if s == "erase" => EventType::Erase,
        Some(other) => return Err(not_representable("type", &other)),
    };
    let timestamp = match f.timestamp {
        None | Some(Value::Null) => None,
        Some(Value::String(s)) => Some(Timestamp::TimestampRfc3339(s)),
        Some(Value::Number(n)) if n.is_i64() => Some(Timestamp::TimestampMs(n.as_i64().expect("is_i64"))),
        Some(other) => return Err(not_representable("timestamp", &other)),
    };
    let interaction = match f.interaction {
        None | Some(Value::Null) => Interaction::Unspecified,
        Some(Value::String(s)) if s == "click" => Interaction::Click,
        Some(Value::String(s)) if s == "view" => Interaction::View,
        Some(other) => return Err(not_representable("interaction", &other)),
    };
    let value = match f.value {
        None | Some(Value::Null) => None,
        Some(Value::Number(n)) => Some(n.as_f64().expect("a JSON number converts to f64")),
        Some(other) => return Err(not_representable("value", &other)),
    };
    let msg = InputEvent {
        r#type: kind as i32,
        event_id: opt_string("event_id", f.event_id)?,
        user_id: opt_string("user_id", f.user_id)?,
        user_key: opt_string("user_key", f.user_key)?,
        consent: match f.consent {
            None | Some(Value::Null) => None,
            Some(Value::Object(o)) => Some(crate::pb::Consent {
                measurement: match o.get("measurement") {
                    None | Some(Value::Null) => None,
                    Some(Value::Bool(b)) => Some(*b),
                    Some(other) => return Err(not_representable("consent.measurement", other)),
                },
            }),
            Some(other) => return Err(not_representable("consent", &other)),
        },
        timestamp,
        channel: opt_string("channel", f.channel)?,
        campaign: opt_string("campaign", f.campaign)?,
        interaction: interaction as i32,
        goal: opt_string("goal", f.goal)?,
        value,
        currency: opt_string("currency", f.currency)?,
    };
    Ok(msg.encode_to_vec())
}
