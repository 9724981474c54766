//! The input contract: parsing and validating one event.
//!
//! Every rule of the input contract (docs/contract.md, "Input events" and
//! "Reject reasons") is checked here and nowhere else. A line that breaks a rule yields a [`Rejection`]
//! with a stable, machine-readable [`RejectReason`] and a human detail; the
//! caller routes it to the dead-letter output and carries on.
//!
//! Parsing borrows from the input line: each field is first read as a loose
//! JSON scalar ([`Loose`]) so that a wrong type is reported against its field
//! instead of as an opaque serde error.

use std::borrow::Cow;
use std::fmt;

use serde::de::{Deserializer, IgnoredAny, MapAccess, SeqAccess, Visitor};
use serde::{Deserialize, Serialize};

use crate::reject::{RejectReason, Rejection};
use crate::time as time_fmt;

/// Largest accepted input line / message, in bytes (default).
pub const DEFAULT_MAX_EVENT_BYTES: usize = 1 << 20;
/// Maximum length of `event_id`, in bytes.
pub const MAX_EVENT_ID_BYTES: usize = 128;
/// Maximum length of `user_id`, in bytes.
pub const MAX_USER_ID_BYTES: usize = 256;
/// Maximum length of `channel`, `campaign` and `goal`, in bytes.
pub const MAX_LABEL_BYTES: usize = 256;

/// Kind of an input event.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum EventKind {
    /// A marketing touch (click or view).
    Touch,
    /// A conversion to be credited.
    Conversion,
    /// A request to forget everything held for the user.
    Erase,
}

impl EventKind {
    /// The contract's spelling.
    pub fn as_str(self) -> &'static str {
        match self {
            EventKind::Touch => "touch",
            EventKind::Conversion => "conversion",
            EventKind::Erase => "erase",
        }
    }
}

/// How a touch happened.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize, Default)]
#[serde(rename_all = "snake_case")]
pub enum Interaction {
    /// A click (the default).
    #[default]
    Click,
    /// An impression / view.
    View,
}

impl Interaction {
    /// The contract's spelling.
    pub fn as_str(self) -> &'static str {
        match self {
            Interaction::Click => "click",
            Interaction::View => "view",
        }
    }
}

/// A validated input event. `user_id` is still the raw id: pseudonymize it
/// at once with [`crate::Pseudonymizer`] and drop this value.
#[derive(Debug, Clone, PartialEq)]
pub struct Event {
    /// Kind of event.
    pub kind: EventKind,
    /// Unique id (empty for `erase`).
    pub event_id: String,
    /// Raw user id. Never stored, logged or written out. Empty for an
    /// erase that names the user by `user_key`.
    pub user_id: String,
    /// Erase only: the user named by pseudonymous key (the `user_key` of the
    /// output rows) instead of by raw id.
    pub user_key: Option<crate::UserKey>,
    /// Event time, epoch milliseconds.
    pub timestamp_ms: i64,
    /// Channel (touches only; empty otherwise).
    pub channel: String,
    /// Campaign, if given.
    pub campaign: Option<String>,
    /// Click or view (touches only).
    pub interaction: Interaction,
    /// Conversion goal (conversions only; `conversion` by default).
    pub goal: String,
    /// Conversion value.
    pub value: Option<f64>,
    /// ISO 4217 currency of `value`.
    pub currency: Option<String>,
    /// `consent.measurement`: `Some(false)` when the person did not consent
    /// to measurement (the event is then counted, never stored or
    /// credited; an erase is applied regardless). `None`: not stated.
    pub measurement_consent: Option<bool>,
}

/// A JSON value read loosely, so that each field's type can be checked with
/// a precise reason. Arrays and objects are skipped, not kept.
#[derive(Debug, Clone, PartialEq)]
pub enum Loose<'a> {
    /// JSON null.
    Null,
    /// true / false.
    Bool(bool),
    /// A number that fits i64.
    Int(i64),
    /// A non-negative integer above i64::MAX.
    UInt(u64),
    /// Any other number.
    Float(f64),
    /// A string (borrowed when it had no escapes).
    Str(Cow<'a, str>),
    /// An array or object.
    Composite,
}

impl Event {
    /// The person did not consent to measurement (`consent.measurement`
    /// false) and the event is not an erase: count it and drop it unread
    /// (contract: Input events, Consent).
    pub fn without_consent(&self) -> bool {
        self.measurement_consent == Some(false) && self.kind != EventKind::Erase
    }
}

impl Loose<'_> {
    fn kind(&self) -> &'static str {
        match self {
            Loose::Null => "null",
            Loose::Bool(_) => "a boolean",
            Loose::Int(_) | Loose::UInt(_) | Loose::Float(_) => "a number",
            Loose::Str(_) => "a string",
            Loose::Composite => "an array or object",
        }
    }
}

impl<'de: 'a, 'a> Deserialize<'de> for Loose<'a> {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Loose<'de>;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("any JSON value")
            }
            fn visit_unit<E>(self) -> Result<Self::Value, E> {
                Ok(Loose::Null)
            }
            fn visit_none<E>(self) -> Result<Self::Value, E> {
                Ok(Loose::Null)
            }
            fn visit_bool<E>(self, v: bool) -> Result<Self::Value, E> {
                Ok(Loose::Bool(v))
            }
            fn visit_i64<E>(self, v: i64) -> Result<Self::Value, E> {
                Ok(Loose::Int(v))
            }
            fn visit_u64<E>(self, v: u64) -> Result<Self::Value, E> {
                Ok(i64::try_from(v).map(Loose::Int).unwrap_or(Loose::UInt(v)))
            }
            fn visit_f64<E>(self, v: f64) -> Result<Self::Value, E> {
                Ok(Loose::Float(v))
            }
            fn visit_borrowed_str<E>(self, v: &'de str) -> Result<Self::Value, E> {
                Ok(Loose::Str(Cow::Borrowed(v)))
            }
            fn visit_str<E>(self, v: &str) -> Result<Self::Value, E> {
                Ok(Loose::Str(Cow::Owned(v.to_string())))
            }
            fn visit_string<E>(self, v: String) -> Result<Self::Value, E> {
                Ok(Loose::Str(Cow::Owned(v)))
            }
            fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Self::Value, A::Error> {
                while seq.next_element::<IgnoredAny>()?.is_some() {}
                Ok(Loose::Composite)
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Self::Value, A::Error> {
                while map.next_entry::<IgnoredAny, IgnoredAny>()?.is_some() {}
                Ok(Loose::Composite)
            }
        }
        d.deserialize_any(V)
    }
}

/// The fields of the contract, read loosely. Unknown fields are ignored.
#[derive(Debug, Default, Deserialize)]
struct RawEvent<'a> {
    #[serde(borrow, rename = "type")]
    kind: Option<Loose<'a>>,
    #[serde(borrow)]
    event_id: Option<Loose<'a>>,
    #[serde(borrow)]
    user_id: Option<Loose<'a>>,
    #[serde(borrow)]
    user_key: Option<Loose<'a>>,
    #[serde(borrow)]
    timestamp: Option<Loose<'a>>,
    #[serde(borrow)]
    channel: Option<Loose<'a>>,
    #[serde(borrow)]
    campaign: Option<Loose<'a>>,
    #[serde(borrow)]
    interaction: Option<Loose<'a>>,
    #[serde(borrow)]
    goal: Option<Loose<'a>>,
    #[serde(borrow)]
    value: Option<Loose<'a>>,
    #[serde(borrow)]
    currency: Option<Loose<'a>>,
    #[serde(borrow)]
    consent: Option<Consent<'a>>,
}

/// The `consent` field, read loosely: an object's `measurement` (its other
/// keys skipped unread, a repeated `measurement` an error like a repeated
/// contract field), or the JSON kind of anything else.
#[derive(Debug)]
enum Consent<'a> {
    /// An object.
    Object {
        /// Its `measurement`, as given.
        measurement: Option<Loose<'a>>,
    },
    /// Not an object (null is absent, handled by `Option`).
    Other(&'static str),
}

impl<'de: 'a, 'a> Deserialize<'de> for Consent<'a> {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Consent<'de>;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("any JSON value")
            }
            fn visit_unit<E>(self) -> Result<Self::Value, E> {
                Ok(Consent::Other("null"))
            }
            fn visit_bool<E>(self, _: bool) -> Result<Self::Value, E> {
                Ok(Consent::Other("a boolean"))
            }
            fn visit_i64<E>(self, _: i64) -> Result<Self::Value, E> {
                Ok(Consent::Other("a number"))
            }
            fn visit_u64<E>(self, _: u64) -> Result<Self::Value, E> {
                Ok(Consent::Other("a number"))
            }
            fn visit_f64<E>(self, _: f64) -> Result<Self::Value, E> {
                Ok(Consent::Other("a number"))
            }
            fn visit_str<E>(self, _: &str) -> Result<Self::Value, E> {
                Ok(Consent::Other("a string"))
            }
            fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Self::Value, A::Error> {
                while seq.next_element::<IgnoredAny>()?.is_some() {}
                Ok(Consent::Other("an array"))
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Self::Value, A::Error> {
                let mut measurement = None;
                while let Some(key) = map.next_key::<Cow<'de, str>>()? {
                    if key == "measurement" {
                        if measurement.is_some() {
                            return Err(serde::de::Error::duplicate_field("measurement"));
                        }
                        measurement = Some(map.next_value::<Loose<'de>>()?);
                    } else {
                        map.next_value::<IgnoredAny>()?;
                    }
                }
                Ok(Consent::Object { measurement })
            }
        }
        d.deserialize_any(V)
    }
}

/// A user key as the output rows write it: exactly 64 lowercase hex digits.
pub fn parse_user_key(s: &str) -> Option<crate::UserKey> {
    let lower_hex = s.len() == 64 && s.bytes().all(|c| c.is_ascii_digit() || (b'a'..=b'f').contains(&c));
    lower_hex.then(|| crate::UserKey::from_hex(s)).flatten()
}

/// Treats JSON null as absent.
fn present<'a, 'b>(v: &'b Option<Loose<'a>>) -> Option<&'b Loose<'a>> {
    match v {
        None | Some(Loose::Null) => None,
        Some(v) => Some(v),
    }
}

fn string_field(
    v: &Option<Loose<'_>>,
    field: &str,
    max: usize,
    missing: Option<RejectReason>,
    invalid: RejectReason,
) -> Result<Option<String>, Rejection> {
    match present(v) {
        None => match missing {
            Some(reason) => Err(Rejection::new(reason, format!("field `{field}` is required"))),
            None => Ok(None),
        },
        Some(Loose::Str(s)) => {
            if s.is_empty() {
                Err(Rejection::new(invalid, format!("field `{field}` must not be empty")))
            } else if s.contains('\0') {
                // Valid JSON (`\u0000`), but PostgreSQL text cannot hold it
                // and a C reader of the other outputs would cut the string
                // there (docs/contract.md, "Input events").
                Err(Rejection::new(invalid, format!("field `{field}` must not contain U+0000 (NUL)")))
            } else if s.len() > max {
                Err(Rejection::new(invalid, format!("field `{field}` is {} bytes, at most {max} allowed", s.len())))
            } else {
                Ok(Some(s.to_string()))
            }
        }
        Some(other) => Err(Rejection::new(invalid, format!("field `{field}` must be a string, got {}", other.kind()))),
    }
}

/// The fields of `ev` as the contract writes them (only the fields its kind
/// reads; the time as epoch milliseconds), with `user_id` in place of the
/// event's own (e.g. a user key, where the raw id must not travel on). An
/// erase by user key with an empty `user_id` is written with its
/// `user_key`. Parsing the result gives back the same event.
pub fn event_fields(ev: &Event, user_id: &str) -> serde_json::Map<String, serde_json::Value> {
    let mut m = serde_json::Map::new();
    m.insert("type".into(), ev.kind.as_str().into());
    if !ev.event_id.is_empty() {
        m.insert("event_id".into(), ev.event_id.clone().into());
    }
    match &ev.user_key {
        Some(k) if user_id.is_empty() => m.insert("user_key".into(), k.to_hex().into()),
        _ => m.insert("user_id".into(), user_id.into()),
    };
    if let Some(c) = ev.measurement_consent {
        m.insert("consent".into(), serde_json::json!({ "measurement": c }));
    }
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
    m
}

/// True when `code` is three ASCII capital letters, the shape of an ISO 4217
/// alphabetic code.
pub fn is_currency_code(code: &str) -> bool {
    code.len() == 3 && code.bytes().all(|b| b.is_ascii_uppercase())
}

/// Parses and validates one event (one NDJSON line or one message body),
/// with the default size limit.
pub fn parse_event(line: &[u8]) -> Result<Event, Rejection> {
    parse_event_limited(line, DEFAULT_MAX_EVENT_BYTES)
}

/// Parses and validates one event, rejecting anything above `max_bytes`.
pub fn parse_event_limited(line: &[u8], max_bytes: usize) -> Result<Event, Rejection> {
    if line.len() > max_bytes {
        return Err(Rejection::new(
            RejectReason::TooLarge,
            format!("event is {} bytes, at most {max_bytes} allowed", line.len()),
        ));
    }
    let text =
        std::str::from_utf8(line).map_err(|e| Rejection::new(RejectReason::InvalidUtf8, format!("not UTF-8: {e}")))?;
    if text.starts_with('\u{feff}') {
        // RFC 8259 section 8.1: a byte order mark must not be sent; say so
        // rather than "expected value at column 1".
        return Err(Rejection::new(
            RejectReason::InvalidJson,
            "not valid JSON: starts with a byte order mark (U+FEFF), which RFC 8259 section 8.1 forbids",
        ));
    }
    let trimmed = text.trim();
    if !trimmed.starts_with('{') {
        // Distinguish "valid JSON, wrong shape" from "not JSON".
        return Err(match serde_json::from_str::<IgnoredAny>(trimmed) {
            Ok(_) => Rejection::new(RejectReason::NotAnObject, "event must be a JSON object"),
            Err(e) => Rejection::new(RejectReason::InvalidJson, format!("not valid JSON: {e}")),
        });
    }
    let raw: RawEvent<'_> = serde_json::from_str(trimmed)
        .map_err(|e| Rejection::new(RejectReason::InvalidJson, format!("not valid JSON: {e}")))?;
    validate(raw)
}

fn validate(raw: RawEvent<'_>) -> Result<Event, Rejection> {
    let kind = match present(&raw.kind) {
        None => return Err(Rejection::new(RejectReason::MissingType, "field `type` is required")),
        Some(Loose::Str(s)) => match s.as_ref() {
            "touch" => EventKind::Touch,
            "conversion" => EventKind::Conversion,
            "erase" => EventKind::Erase,
            other => {
                return Err(Rejection::new(
                    RejectReason::InvalidType,
                    format!("field `type` must be touch, conversion or erase, got {:?}", truncate(other)),
                ))
            }
        },
        Some(other) => {
            return Err(Rejection::new(
                RejectReason::InvalidType,
                format!("field `type` must be a string, got {}", other.kind()),
            ))
        }
    };

    let event_id = if kind == EventKind::Erase {
        // Optional on erase; checked when present.
        string_field(&raw.event_id, "event_id", MAX_EVENT_ID_BYTES, None, RejectReason::InvalidEventId)?
            .unwrap_or_default()
    } else {
        string_field(
            &raw.event_id,
            "event_id",
            MAX_EVENT_ID_BYTES,
            Some(RejectReason::MissingEventId),
            RejectReason::InvalidEventId,
        )?
        .unwrap_or_default()
    };

    let user_key = match present(&raw.user_key) {
        None => None,
        Some(_) if kind != EventKind::Erase => {
            return Err(Rejection::new(
                RejectReason::InvalidUserId,
                "field `user_key` is allowed on erase events only; touches and conversions carry the raw `user_id`",
            ))
        }
        Some(Loose::Str(s)) => Some(parse_user_key(s).ok_or_else(|| {
            Rejection::new(
                RejectReason::InvalidUserId,
                format!(
                    "field `user_key` must be 64 lowercase hex digits (a user_key of the output rows), got {:?}",
                    truncate(s)
                ),
            )
        })?),
        Some(other) => {
            return Err(Rejection::new(
                RejectReason::InvalidUserId,
                format!("field `user_key` must be a string, got {}", other.kind()),
            ))
        }
    };
    let user_id = if user_key.is_some() {
        if present(&raw.user_id).is_some() {
            return Err(Rejection::new(
                RejectReason::InvalidUserId,
                "an erase names its user by `user_id` or by `user_key`, not both",
            ));
        }
        String::new()
    } else {
        string_field(
            &raw.user_id,
            "user_id",
            MAX_USER_ID_BYTES,
            Some(RejectReason::MissingUserId),
            RejectReason::InvalidUserId,
        )?
        .unwrap_or_default()
    };

    let timestamp_ms =
        match present(&raw.timestamp) {
            None => return Err(Rejection::new(RejectReason::MissingTimestamp, "field `timestamp` is required")),
            Some(Loose::Str(s)) => time_fmt::parse_rfc3339_ms(s).ok_or_else(|| {
                Rejection::new(
                    RejectReason::InvalidTimestamp,
                    format!("field `timestamp` is not an RFC 3339 date-time: {:?}", truncate(s)),
                )
            })?,
            Some(Loose::Int(ms)) if time_fmt::in_range(*ms) => *ms,
            Some(Loose::Int(_)) | Some(Loose::UInt(_)) => {
                return Err(Rejection::new(
                    RejectReason::InvalidTimestamp,
                    "field `timestamp` epoch milliseconds out of range (years 1 to 9999)",
                ))
            }
            // Beyond u64 a JSON integer arrives as a float: still out of range.
            Some(Loose::Float(v)) if v.fract() == 0.0 && !time_fmt::in_range_f64(*v) => {
                return Err(Rejection::new(
                    RejectReason::InvalidTimestamp,
                    "field `timestamp` epoch milliseconds out of range (years 1 to 9999)",
                ))
            }
            Some(Loose::Float(_)) => return Err(Rejection::new(
                RejectReason::InvalidTimestamp,
                "field `timestamp` must be an RFC 3339 string or integer epoch milliseconds, got a number with a fraction or exponent",
            )),
            Some(other) => {
                return Err(Rejection::new(
                    RejectReason::InvalidTimestamp,
                    format!(
                        "field `timestamp` must be an RFC 3339 string or integer epoch milliseconds, got {}",
                        other.kind()
                    ),
                ))
            }
        };

    let mut ev = Event {
        kind,
        event_id,
        user_id,
        user_key,
        timestamp_ms,
        channel: String::new(),
        campaign: None,
        interaction: Interaction::Click,
        goal: String::new(),
        value: None,
        currency: None,
        measurement_consent: None,
    };

    match kind {
        EventKind::Touch => {
            ev.channel = string_field(
                &raw.channel,
                "channel",
                MAX_LABEL_BYTES,
                Some(RejectReason::MissingChannel),
                RejectReason::InvalidChannel,
            )?
            .unwrap_or_default();
            ev.campaign =
                string_field(&raw.campaign, "campaign", MAX_LABEL_BYTES, None, RejectReason::InvalidCampaign)?;
            ev.interaction = match present(&raw.interaction) {
                None => Interaction::Click,
                Some(Loose::Str(s)) if s == "click" => Interaction::Click,
                Some(Loose::Str(s)) if s == "view" => Interaction::View,
                Some(other) => {
                    let got = match other {
                        Loose::Str(s) => format!("{:?}", truncate(s)),
                        o => o.kind().to_string(),
                    };
                    return Err(Rejection::new(
                        RejectReason::InvalidInteraction,
                        format!("field `interaction` must be \"click\" or \"view\", got {got}"),
                    ));
                }
            };
        }
        EventKind::Conversion => {
            ev.goal = string_field(&raw.goal, "goal", MAX_LABEL_BYTES, None, RejectReason::InvalidGoal)?
                .unwrap_or_else(|| "conversion".to_string());
            ev.value = match present(&raw.value) {
                None => None,
                Some(Loose::Int(v)) if *v >= 0 => Some(*v as f64),
                Some(Loose::UInt(v)) => Some(*v as f64),
                // -0.0 passes `>= 0.0`; store it as 0.0 so that no output
                // shows a negative zero credited value.
                Some(Loose::Float(v)) if v.is_finite() && *v >= 0.0 => Some(if *v == 0.0 { 0.0 } else { *v }),
                Some(Loose::Int(_)) | Some(Loose::Float(_)) => {
                    return Err(Rejection::new(
                        RejectReason::InvalidValue,
                        "field `value` must be a finite number >= 0",
                    ))
                }
                Some(other) => {
                    return Err(Rejection::new(
                        RejectReason::InvalidValue,
                        format!("field `value` must be a number, got {}", other.kind()),
                    ))
                }
            };
            ev.currency = match present(&raw.currency) {
                None => None,
                Some(Loose::Str(s)) if is_currency_code(s) => Some(s.to_string()),
                Some(Loose::Str(s)) => {
                    return Err(Rejection::new(
                        RejectReason::InvalidCurrency,
                        format!(
                            "field `currency` must be an ISO 4217 code of three capital letters, got {:?}",
                            truncate(s)
                        ),
                    ))
                }
                Some(other) => {
                    return Err(Rejection::new(
                        RejectReason::InvalidCurrency,
                        format!("field `currency` must be a string, got {}", other.kind()),
                    ))
                }
            };
        }
        EventKind::Erase => {}
    }
    ev.measurement_consent = match &raw.consent {
        None => None,
        Some(Consent::Other(kind)) => {
            return Err(Rejection::new(
                RejectReason::InvalidConsent,
                format!("field `consent` must be an object such as {{\"measurement\": false}}, got {kind}"),
            ))
        }
        Some(Consent::Object { measurement }) => match present(measurement) {
            None => None,
            Some(Loose::Bool(b)) => Some(*b),
            Some(other) => {
                return Err(Rejection::new(
                    RejectReason::InvalidConsent,
                    format!("field `consent.measurement` must be true or false, got {}", other.kind()),
                ))
            }
        },
    };
    Ok(ev)
}

/// Shortens a user-supplied string for an error message.
fn truncate(s: &str) -> String {
    if s.len() <= 64 {
        return s.to_string();
    }
    let mut end = 64;
    while !s.is_char_boundary(end) {
        end -= 1;
    }
    format!("{}...", &s[..end])
}

#[cfg(test)]
mod tests {
    use super::*;

    fn touch_with(extra: &str) -> String {
        format!(
            r#"{{"type":"touch","event_id":"t1","user_id":"u1","timestamp":"2026-03-01T10:00:00Z","channel":"email"{extra}}}"#
        )
    }

    fn reason(line: &[u8]) -> (RejectReason, String) {
        let r = parse_event(line).expect_err("rejected");
        (r.reason, r.detail)
    }

    #[test]
    fn consent_is_an_optional_object_with_a_boolean() {
        // Contract: Input events, Consent (derived by hand); JSON types per
        // RFC 8259. `measurement` false marks the event; true, null or no
        // consent leave it as before; other keys are ignored.
        let cases: [(&str, Option<bool>); 6] = [
            ("", None),
            (r#","consent":null"#, None),
            (r#","consent":{}"#, None),
            (r#","consent":{"measurement":null,"marketing":"yes"}"#, None),
            (r#","consent":{"measurement":true}"#, Some(true)),
            (r#","consent":{"other":[1,{"measurement":1}],"measurement":false}"#, Some(false)),
        ];
        for (extra, want) in cases {
            let ev = parse_event(touch_with(extra).as_bytes()).unwrap();
            assert_eq!(ev.measurement_consent, want, "{extra}");
            assert_eq!(ev.without_consent(), want == Some(false), "{extra}");
            // The shared writer keeps it.
            let again = serde_json::to_vec(&event_fields(&ev, &ev.user_id)).unwrap();
            assert_eq!(parse_event(&again).unwrap(), ev, "{extra}");
        }
        for (extra, want) in [
            (r#","consent":false"#, "must be an object"),
            (r#","consent":"none""#, "got a string"),
            (r#","consent":[]"#, "got an array"),
            (r#","consent":{"measurement":"false"}"#, "must be true or false, got a string"),
            (r#","consent":{"measurement":0}"#, "must be true or false, got a number"),
        ] {
            let (r, detail) = reason(touch_with(extra).as_bytes());
            assert_eq!(r, RejectReason::InvalidConsent, "{extra}");
            assert!(detail.contains(want), "{extra}: {detail}");
        }
        // A repeated `measurement` is refused like a repeated contract field.
        let (r, _) = reason(touch_with(r#","consent":{"measurement":true,"measurement":false}"#).as_bytes());
        assert_eq!(r, RejectReason::InvalidJson);
        // An erase is applied whatever its consent says.
        let erase = parse_event(br#"{"type":"erase","user_id":"u","timestamp":0,"consent":{"measurement":false}}"#);
        assert!(!erase.unwrap().without_consent());
    }

    #[test]
    fn an_erase_can_name_its_user_by_key() {
        // Contract: Input events (erase by user_key). The key is 32 bytes
        // written as 64 lowercase hex digits, as in the output rows.
        let k = "0123456789abcdef".repeat(4);
        let line = format!(r#"{{"type":"erase","event_id":"r1","user_key":"{k}","timestamp":0}}"#);
        let ev = parse_event(line.as_bytes()).unwrap();
        assert_eq!(ev.user_key.map(|u| u.to_hex()), Some(k.clone()));
        assert_eq!(ev.user_id, "");
        // The shared writer gives the same event back.
        let again = serde_json::to_vec(&event_fields(&ev, "")).unwrap();
        assert_eq!(parse_event(&again).unwrap(), ev);
        for (line, want) in [
            (
                format!(r#"{{"type":"touch","event_id":"t","user_key":"{k}","timestamp":0,"channel":"x"}}"#),
                "erase events only",
            ),
            (format!(r#"{{"type":"erase","user_id":"u","user_key":"{k}","timestamp":0}}"#), "not both"),
            (format!(r#"{{"type":"erase","user_key":"{}","timestamp":0}}"#, k.to_uppercase()), "64 lowercase hex"),
            (format!(r#"{{"type":"erase","user_key":"{}","timestamp":0}}"#, &k[..63]), "64 lowercase hex"),
            (r#"{"type":"erase","user_key":7,"timestamp":0}"#.to_string(), "must be a string"),
        ] {
            let (r, detail) = reason(line.as_bytes());
            assert_eq!(r, RejectReason::InvalidUserId, "{line}");
            assert!(detail.contains(want), "{line}: {detail}");
        }
        // Null is absent: the raw id is then required, as before.
        let (r, _) = reason(br#"{"type":"erase","user_key":null,"timestamp":0}"#);
        assert_eq!(r, RejectReason::MissingUserId);
    }

    #[test]
    fn byte_order_mark_is_named() {
        // RFC 8259 section 8.1: "Implementations MUST NOT add a byte order
        // mark (U+FEFF) to the beginning of a networked-transmitted JSON text."
        let mut line = "\u{feff}".as_bytes().to_vec();
        line.extend_from_slice(touch_with("").as_bytes());
        let (r, d) = reason(&line);
        assert_eq!(r, RejectReason::InvalidJson);
        assert!(d.contains("byte order mark"), "{d}");
        // Without it the same line is accepted.
        assert!(parse_event(touch_with("").as_bytes()).is_ok());
    }

    #[test]
    fn nul_in_a_string_field_is_rejected_by_field() {
        // `\u0000` is a valid JSON escape (RFC 8259 section 7) but no text
        // column of PostgreSQL can hold U+0000 (PostgreSQL manual, "Character
        // Types": "the character with code zero ... cannot be stored").
        let line = r#"{"type":"touch","event_id":"t1","user_id":"u1","timestamp":"2026-03-01T10:00:00Z","channel":"e\u0000mail"}"#;
        let (r, d) = reason(line.as_bytes());
        assert_eq!(r, RejectReason::InvalidChannel);
        assert!(d.contains("U+0000"), "{d}");
        let line =
            r#"{"type":"touch","event_id":"t\u0000","user_id":"u1","timestamp":"2026-03-01T10:00:00Z","channel":"x"}"#;
        assert_eq!(reason(line.as_bytes()).0, RejectReason::InvalidEventId);
        let line = r#"{"type":"conversion","event_id":"c","user_id":"\u0000","timestamp":0}"#;
        assert_eq!(reason(line.as_bytes()).0, RejectReason::InvalidUserId);
        let line = r#"{"type":"conversion","event_id":"c","user_id":"u","timestamp":0,"goal":"a\u0000"}"#;
        assert_eq!(reason(line.as_bytes()).0, RejectReason::InvalidGoal);
    }

    #[test]
    fn whole_timestamps_beyond_u64_are_out_of_range_not_fractional() {
        // 2^64 = 18446744073709551616 (derived by hand) does not fit u64, so
        // the JSON reader hands it over as a float.
        let line = r#"{"type":"conversion","event_id":"c","user_id":"u","timestamp":18446744073709551616}"#;
        let (r, d) = reason(line.as_bytes());
        assert_eq!(r, RejectReason::InvalidTimestamp);
        assert!(d.contains("out of range"), "{d}");
        let line = r#"{"type":"conversion","event_id":"c","user_id":"u","timestamp":-1e300}"#;
        assert!(reason(line.as_bytes()).1.contains("out of range"));
        // In range but written with an exponent or a fraction: not an integer.
        for ts in ["1e12", "1772359200000.5"] {
            let line = format!(r#"{{"type":"conversion","event_id":"c","user_id":"u","timestamp":{ts}}}"#);
            let (r, d) = reason(line.as_bytes());
            assert_eq!(r, RejectReason::InvalidTimestamp);
            assert!(d.contains("fraction or exponent"), "{ts}: {d}");
        }
    }

    #[test]
    fn negative_zero_value_is_stored_as_zero() {
        // IEEE 754 -0.0 compares equal to 0.0, so it passes `>= 0`; it must
        // not reach an output as "-0.0".
        let line = r#"{"type":"conversion","event_id":"c","user_id":"u","timestamp":0,"value":-0.0}"#;
        let v = parse_event(line.as_bytes()).unwrap().value.unwrap();
        assert_eq!(v, 0.0);
        assert!(v.is_sign_positive());
    }

    #[test]
    fn leap_second_is_read_as_the_last_millisecond_before_midnight() {
        // RFC 3339 section 5.7 allows second 60 at a leap second; the IERS
        // inserted one at 2016-12-31T23:59:60Z (IERS Bulletin C 52). Epoch
        // milliseconds have no leap seconds (POSIX time), so it is read as
        // 23:59:59.999, keeping the order of events around it.
        let line = touch_with("").replace("2026-03-01T10:00:00Z", "2016-12-31T23:59:60Z");
        let ev = parse_event(line.as_bytes()).unwrap();
        assert_eq!(time_fmt::format_ms(ev.timestamp_ms), "2016-12-31T23:59:59.999Z");
    }
}
