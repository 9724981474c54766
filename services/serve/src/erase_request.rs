//! The body of `POST /v1/erase` (embedded ingest listener, and the admin
//! listener in Kafka mode; contract: HTTP ingest, Erase): whom to erase, by
//! raw id or by user key, and an optional request id. A raw id is
//! pseudonymized here, at once; the erase event made from a request names
//! the user by key only, so no raw id is queued or produced.

use apportion_contract::event::{parse_event, MAX_USER_ID_BYTES};
use apportion_contract::UserKey;
use apportion_engine::Pseudonymizer;

/// A valid erase request.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct EraseRequest {
    /// The user.
    pub user_key: UserKey,
    /// The caller's id for the request: the erase event's `event_id` (a
    /// repeat is a duplicate) and the audit record's `request_id`.
    pub request_id: Option<String>,
}

#[derive(serde::Deserialize)]
#[serde(deny_unknown_fields)]
struct Body {
    user_id: Option<String>,
    user_key: Option<String>,
    request_id: Option<String>,
}

const SHAPE: &str =
    r#"the body must be {"user_id": "..."} or {"user_key": "<64 hex digits>"}, with an optional "request_id""#;

impl EraseRequest {
    /// Reads a request body; the error says what is wrong with it.
    pub fn parse(body: &[u8], pseudo: &Pseudonymizer) -> Result<EraseRequest, String> {
        let b: Body = serde_json::from_slice(body).map_err(|e| format!("{SHAPE}: {e}"))?;
        let user_key = match (b.user_id, b.user_key) {
            (Some(id), None) => {
                if id.is_empty() || id.len() > MAX_USER_ID_BYTES || id.contains('\0') {
                    return Err(format!(
                        "user_id must be 1..={MAX_USER_ID_BYTES} bytes without U+0000, like an event's"
                    ));
                }
                pseudo.key_for(&id)
            }
            (None, Some(k)) => parse_user_key(&k)?,
            (Some(_), Some(_)) => return Err(format!("{SHAPE}: give user_id or user_key, not both")),
            (None, None) => return Err(format!("{SHAPE}: user_id or user_key is missing")),
        };
        let req = EraseRequest { user_key, request_id: b.request_id };
        // The event must be one the pipeline accepts (request_id follows the
        // rules of event_id).
        parse_event(&req.event_line(0)).map_err(|r| format!("request_id: {}", r.detail))?;
        Ok(req)
    }

    /// The erase event of the request (contract JSON, by user key), timed
    /// `now_ms`, without a line end.
    pub fn event_line(&self, now_ms: i64) -> Vec<u8> {
        let mut event = serde_json::json!({
            "type": "erase",
            "user_key": self.user_key.to_hex(),
            "timestamp": now_ms,
        });
        if let Some(id) = &self.request_id {
            event["event_id"] = serde_json::Value::String(id.clone());
        }
        serde_json::to_vec(&event).expect("JSON serializes")
    }

    /// The answer's JSON: the user key and the request id.
    pub fn json(&self) -> serde_json::Value {
        serde_json::json!({ "user_key": self.user_key.to_hex(), "request_id": self.request_id })
    }
}

/// A user key as written in output rows: 64 lowercase hex digits.
fn parse_user_key(k: &str) -> Result<UserKey, String> {
    apportion_contract::event::parse_user_key(k).ok_or_else(|| {
        format!(
            "user_key must be 64 lowercase hex digits (the user_key of the output rows), got {} characters",
            k.len()
        )
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    const KEY: &[u8] = b"erase-request-test-key";

    #[test]
    fn a_raw_id_and_its_key_name_the_same_user() {
        // Contract: HTTP ingest, Erase (derived by hand): a raw id and its
        // key (HMAC-SHA256, RFC 2104; the engine's own test pins the HMAC
        // against RFC 4231) make the same request.
        let p = Pseudonymizer::new(KEY);
        let by_id = EraseRequest::parse(br#"{"user_id":"u-1","request_id":"r1"}"#, &p).unwrap();
        assert_eq!(by_id.user_key, p.key_for("u-1"));
        let body = format!(r#"{{"user_key":"{}","request_id":"r1"}}"#, p.key_for("u-1").to_hex());
        assert_eq!(EraseRequest::parse(body.as_bytes(), &p).unwrap(), by_id);
        // The event names the key only.
        let line = String::from_utf8(by_id.event_line(5)).unwrap();
        assert!(!line.contains("u-1"), "{line}");
        assert!(line.contains(&p.key_for("u-1").to_hex()), "{line}");
    }

    #[test]
    fn bad_bodies_say_what_is_wrong() {
        // The 400 reasons of docs/contract.md (HTTP ingest, Erase), derived
        // by hand; the id limits are those of "Input events".
        let p = Pseudonymizer::new(KEY);
        let k = "ab".repeat(32);
        for (body, want) in [
            ("{}".to_string(), "missing"),
            (format!(r#"{{"user_id":"u","user_key":"{k}"}}"#), "not both"),
            (r#"{"user_key":"ABCD"}"#.to_string(), "64 lowercase hex"),
            (format!(r#"{{"user_key":"{}"}}"#, "AB".repeat(32)), "64 lowercase hex"),
            (r#"{"user_id":""}"#.to_string(), "1..=256 bytes"),
            (format!(r#"{{"user_id":"{}"}}"#, "x".repeat(257)), "1..=256 bytes"),
            (r#"{"user_id":"u","who":"me"}"#.to_string(), "unknown field"),
            (format!(r#"{{"user_id":"u","request_id":"{}"}}"#, "r".repeat(129)), "request_id"),
            ("not json".to_string(), "the body must be"),
        ] {
            let e = EraseRequest::parse(body.as_bytes(), &p).unwrap_err();
            assert!(e.contains(want), "{body}: {e}");
        }
    }
}
