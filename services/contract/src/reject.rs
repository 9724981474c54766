//! Why an input event was not applied (docs/contract.md, "Reject reasons").
//!
//! The codes are part of the dead-letter contract and a small fixed set, so
//! they are also safe as metric label values.

use std::fmt;

use serde::{Deserialize, Serialize};

/// Machine-readable reason for rejecting an input event. The string codes
/// (see [`RejectReason::code`]) are part of the dead-letter contract and a
/// fixed, small set, so they are safe as a metric label.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
#[non_exhaustive]
pub enum RejectReason {
    /// Larger than the configured maximum event size.
    TooLarge,
    /// Not valid UTF-8.
    InvalidUtf8,
    /// Not valid JSON (or a duplicated key).
    InvalidJson,
    /// Valid JSON but not an object.
    NotAnObject,
    /// `type` missing or null.
    MissingType,
    /// `type` not one of touch, conversion, erase.
    InvalidType,
    /// `event_id` missing or null (touch, conversion).
    MissingEventId,
    /// `event_id` not a string of 1..=128 bytes.
    InvalidEventId,
    /// `user_id` missing or null.
    MissingUserId,
    /// `user_id` not a string of 1..=256 bytes.
    InvalidUserId,
    /// `timestamp` missing or null.
    MissingTimestamp,
    /// `timestamp` neither RFC 3339 nor integer epoch milliseconds in range.
    InvalidTimestamp,
    /// `channel` missing on a touch.
    MissingChannel,
    /// `channel` not a non-empty string.
    InvalidChannel,
    /// `campaign` not a string.
    InvalidCampaign,
    /// `interaction` not click or view.
    InvalidInteraction,
    /// `goal` not a non-empty string.
    InvalidGoal,
    /// `value` not a finite number >= 0.
    InvalidValue,
    /// `currency` not an ISO 4217 alphabetic code.
    InvalidCurrency,
    /// `consent` not an object, or its `measurement` not a boolean.
    InvalidConsent,
    /// Event time older than the watermark allows (streaming, by policy).
    Late,
    /// Event time further ahead of processing time than `max_future_skew`
    /// (a producer's clock far off, or a bad value); it would otherwise drag
    /// the partition's watermark into the future.
    FutureTimestamp,
}

impl RejectReason {
    /// Every reason, in a fixed order (for metrics pre-registration and docs).
    pub const ALL: [RejectReason; 22] = [
        RejectReason::TooLarge,
        RejectReason::InvalidUtf8,
        RejectReason::InvalidJson,
        RejectReason::NotAnObject,
        RejectReason::MissingType,
        RejectReason::InvalidType,
        RejectReason::MissingEventId,
        RejectReason::InvalidEventId,
        RejectReason::MissingUserId,
        RejectReason::InvalidUserId,
        RejectReason::MissingTimestamp,
        RejectReason::InvalidTimestamp,
        RejectReason::MissingChannel,
        RejectReason::InvalidChannel,
        RejectReason::InvalidCampaign,
        RejectReason::InvalidInteraction,
        RejectReason::InvalidGoal,
        RejectReason::InvalidValue,
        RejectReason::InvalidCurrency,
        RejectReason::InvalidConsent,
        RejectReason::Late,
        RejectReason::FutureTimestamp,
    ];

    /// Stable snake_case code.
    pub fn code(self) -> &'static str {
        match self {
            RejectReason::TooLarge => "too_large",
            RejectReason::InvalidUtf8 => "invalid_utf8",
            RejectReason::InvalidJson => "invalid_json",
            RejectReason::NotAnObject => "not_an_object",
            RejectReason::MissingType => "missing_type",
            RejectReason::InvalidType => "invalid_type",
            RejectReason::MissingEventId => "missing_event_id",
            RejectReason::InvalidEventId => "invalid_event_id",
            RejectReason::MissingUserId => "missing_user_id",
            RejectReason::InvalidUserId => "invalid_user_id",
            RejectReason::MissingTimestamp => "missing_timestamp",
            RejectReason::InvalidTimestamp => "invalid_timestamp",
            RejectReason::MissingChannel => "missing_channel",
            RejectReason::InvalidChannel => "invalid_channel",
            RejectReason::InvalidCampaign => "invalid_campaign",
            RejectReason::InvalidInteraction => "invalid_interaction",
            RejectReason::InvalidGoal => "invalid_goal",
            RejectReason::InvalidValue => "invalid_value",
            RejectReason::InvalidCurrency => "invalid_currency",
            RejectReason::InvalidConsent => "invalid_consent",
            RejectReason::Late => "late",
            RejectReason::FutureTimestamp => "future_timestamp",
        }
    }
}

impl RejectReason {
    /// The reason of a code, if it is one.
    pub fn from_code(code: &str) -> Option<RejectReason> {
        RejectReason::ALL.into_iter().find(|r| r.code() == code)
    }
}

impl fmt::Display for RejectReason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.code())
    }
}

/// Why one event was not processed.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{reason}: {detail}")]
pub struct Rejection {
    /// Machine-readable reason.
    pub reason: RejectReason,
    /// Human-readable detail (never contains the raw user id).
    pub detail: String,
}

impl Rejection {
    /// Builds a rejection.
    pub fn new(reason: RejectReason, detail: impl Into<String>) -> Self {
        Rejection { reason, detail: detail.into() }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn codes_round_trip_and_are_unique() {
        let mut seen = std::collections::BTreeSet::new();
        for r in RejectReason::ALL {
            assert!(seen.insert(r.code()), "{r} twice");
            assert_eq!(RejectReason::from_code(r.code()), Some(r));
            assert_eq!(serde_json::to_string(&r).unwrap(), format!("\"{}\"", r.code()));
        }
        assert_eq!(RejectReason::from_code("nope"), None);
    }
}
