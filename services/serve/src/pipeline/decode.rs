//! Turning a message's bytes into a validated event: the contract's JSON,
//! its protobuf encoding, or the internal pseudonymized form of the
//! repartition topic. A message that cannot be read is described for its
//! dead letter and metrics by what can be sniffed of it (kind, event id),
//! never by its user id.

use apportion_contract::event::{parse_event_limited, MAX_EVENT_ID_BYTES};
use apportion_contract::{Event, EventKind, RejectReason, Rejection, UserKey};

use crate::config::Format;
use crate::kafka::repartition::Carried;
use crate::source::Payload;

/// Decodes one message: the event, and its user key when the payload
/// already carries one (pseudonymized events).
pub fn decode(payload: Payload, bytes: &[u8], max_bytes: usize) -> Result<(Event, Option<UserKey>), Rejection> {
    match payload {
        Payload::Event(Format::Json) => parse_event_limited(bytes, max_bytes).map(|e| (e, None)),
        Payload::Event(Format::Protobuf) => apportion_wire::decode_event_protobuf(bytes, max_bytes).map(|e| (e, None)),
        Payload::Pseudonymized => {
            let ev = parse_event_limited(bytes, max_bytes)?;
            let key = UserKey::from_hex(&ev.user_id)
                .ok_or_else(|| Rejection::new(RejectReason::InvalidUserId, "repartitioned event without a user key"))?;
            Ok((ev, Some(key)))
        }
    }
}

/// The kind (a metric label: `touch`, `conversion`, `erase` or `unknown`)
/// and the `event_id` of a message that was rejected, as far as they can be
/// read. A message longer than `max_bytes` (rejected as `too_large`
/// without being parsed) is not parsed here either: `unknown`, no id, so
/// that a long rejected line costs no parse at all.
pub fn sniff(payload: Payload, bytes: &[u8], max_bytes: usize) -> (&'static str, Option<String>) {
    if bytes.len() > max_bytes {
        return ("unknown", None);
    }
    let (kind, id) = match payload {
        Payload::Event(Format::Protobuf) => apportion_wire::sniff_protobuf(bytes),
        Payload::Event(Format::Json) | Payload::Pseudonymized => sniff_json(bytes),
    };
    (kind.map_or("unknown", EventKind::as_str), id)
}

fn sniff_json(bytes: &[u8]) -> (Option<EventKind>, Option<String>) {
    /// Only the two fields, read without building the whole document;
    /// any other field, of any type, is skipped.
    #[derive(serde::Deserialize)]
    struct Sniffed {
        #[serde(rename = "type", default, deserialize_with = "string_or_none")]
        kind: Option<String>,
        #[serde(default, deserialize_with = "string_or_none")]
        event_id: Option<String>,
    }
    fn string_or_none<'de, D: serde::Deserializer<'de>>(d: D) -> Result<Option<String>, D::Error> {
        use serde::Deserialize;
        Ok(match serde_json::Value::deserialize(d)? {
            serde_json::Value::String(s) => Some(s),
            _ => None,
        })
    }
    let Ok(v) = serde_json::from_slice::<Sniffed>(bytes) else { return (None, None) };
    let kind = match v.kind.as_deref() {
        Some("touch") => Some(EventKind::Touch),
        Some("conversion") => Some(EventKind::Conversion),
        Some("erase") => Some(EventKind::Erase),
        _ => None,
    };
    (kind, v.event_id.filter(|i| i.len() <= MAX_EVENT_ID_BYTES))
}

/// The internal repartitioned form of an event: the contract's JSON with the
/// pseudonymous key in place of the raw `user_id` and the time in epoch ms.
pub fn encode_pseudonymized(ev: &Event, key: &UserKey) -> Vec<u8> {
    encode_pseudonymized_with(ev, key, None)
}

/// [`encode_pseudonymized`], carrying the progress of the event's input
/// partition (see [`crate::kafka::repartition`]).
pub fn encode_pseudonymized_with(ev: &Event, key: &UserKey, carried: Option<&Carried>) -> Vec<u8> {
    let mut m = serde_json::Map::new();
    if let Some(c) = carried {
        m.insert("source".into(), c.source.clone().into());
        m.insert("source_max_ts".into(), c.progress.max_ts.into());
        m.insert("source_caught_up".into(), c.progress.caught_up.into());
    }
    m.extend(apportion_contract::event::event_fields(ev, &key.to_hex()));
    serde_json::to_vec(&serde_json::Value::Object(m)).expect("JSON values serialize")
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A rejected protobuf event is labelled by its real kind, not
    /// `unknown` (the kinds are the contract's, docs/contract.md "Input
    /// events").
    #[test]
    fn rejected_protobuf_events_keep_their_kind() {
        let line = r#"{"type":"conversion","event_id":"c-1","user_id":"u","timestamp":0,"currency":"eur"}"#;
        let bytes = apportion_wire::encode_event_protobuf(line).unwrap();
        let p = Payload::Event(Format::Protobuf);
        let r = decode(p, &bytes, 1 << 20).unwrap_err();
        assert_eq!(r.reason, RejectReason::InvalidCurrency);
        assert_eq!(sniff(p, &bytes, 1 << 20), ("conversion", Some("c-1".into())));
        assert_eq!(sniff(p, b"\xff\xff", 1 << 20), ("unknown", None));
        let json = Payload::Event(Format::Json);
        assert_eq!(sniff(json, line.as_bytes(), 1 << 20), ("conversion", Some("c-1".into())));
        // Longer than the limit: rejected unparsed (too_large), sniffed as nothing.
        assert_eq!(sniff(json, line.as_bytes(), line.len() - 1), ("unknown", None));
        // A field of another type than expected is left out; other fields are skipped.
        assert_eq!(
            sniff(json, br#"{"type":7,"event_id":"e","x":[1,{"y":null}]}"#, 1 << 20),
            ("unknown", Some("e".into()))
        );
        assert_eq!(sniff(json, br#"{"type":"erase","event_id":{"a":1}}"#, 1 << 20), ("erase", None));
        assert_eq!(sniff(json, b"[1,2]", 1 << 20), ("unknown", None));
    }

    /// The pseudonymized form reads back to the same event with the key
    /// instead of the raw id.
    #[test]
    fn pseudonymized_round_trip() {
        let line = r#"{"type":"touch","event_id":"t-1","user_id":"raw-user","timestamp":"2026-03-01T00:00:00Z","channel":"email","campaign":"spring","interaction":"view"}"#;
        let ev = parse_event_limited(line.as_bytes(), 1 << 20).unwrap();
        let key = UserKey([7; 32]);
        let bytes = encode_pseudonymized(&ev, &key);
        assert!(!String::from_utf8_lossy(&bytes).contains("raw-user"));
        let (back, k) = decode(Payload::Pseudonymized, &bytes, 1 << 20).unwrap();
        assert_eq!(k, Some(key));
        assert_eq!(Event { user_id: ev.user_id.clone(), ..back }, ev);
    }
}
