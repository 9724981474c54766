//! The output rows (docs/contract.md, "Credit rows", "Path rows", "Dead
//! letters").
//!
//! Values stay typed until the output edge: the user key is binary, times
//! are epoch milliseconds ([`Timestamp`]), the model and the interaction are
//! enums. Their serde form is the contract's JSON (hex key, RFC 3339 times,
//! names), field for field and in the contract's order, so `serde_json`
//! writes exactly the documented rows; Parquet and PostgreSQL take the typed
//! values directly and never parse text back.

use serde::{Deserialize, Serialize};

use crate::event::Interaction;
use crate::key::UserKey;
use crate::model_id::ModelId;
use crate::reject::RejectReason;
use crate::time::Timestamp;

/// Channel name of the single row of a conversion with no eligible touch.
pub const UNATTRIBUTED: &str = "unattributed";

/// One credit row. Field order is the contract's.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CreditRow {
    /// Deterministic id from (conversion_id, model, position).
    pub credit_id: String,
    /// The conversion's `event_id`.
    pub conversion_id: String,
    /// Pseudonymous user key.
    pub user_key: UserKey,
    /// Model.
    pub model: ModelId,
    /// Snapshot id for data-driven models.
    pub model_version: Option<String>,
    /// Conversion goal.
    pub goal: String,
    /// The touch's `event_id`; null for `unattributed`.
    pub touch_event_id: Option<String>,
    /// Channel of the touch, or `unattributed`.
    pub channel: String,
    /// Campaign of the touch.
    pub campaign: Option<String>,
    /// `click` / `view`; null for `unattributed`.
    pub interaction: Option<Interaction>,
    /// 1-based position in the eligible path (0 for `unattributed`).
    pub position: u32,
    /// Number of eligible touches (0 for `unattributed`).
    pub path_length: u32,
    /// Time of the touch.
    pub touch_timestamp: Option<Timestamp>,
    /// Time of the conversion.
    pub conversion_timestamp: Timestamp,
    /// Fraction of the conversion.
    pub credit: f64,
    /// `credit * value` when the conversion has a value.
    pub credited_value: Option<f64>,
    /// ISO 4217 currency of the value.
    pub currency: Option<String>,
}

/// One closed path (converting or not).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PathRow {
    /// `c:<conversion id>` or `n:<digest>` (see the contract).
    pub path_id: String,
    /// Pseudonymous user key.
    pub user_key: UserKey,
    /// True when the path ended in a conversion.
    pub converted: bool,
    /// The conversion's `event_id` (converting paths).
    pub conversion_id: Option<String>,
    /// The conversion's goal (converting paths).
    pub goal: Option<String>,
    /// Channel of every touch, in path order.
    pub channels: Vec<String>,
    /// Number of touches.
    pub touch_count: u32,
    /// Time of the first touch.
    pub first_touch_timestamp: Timestamp,
    /// Time of the last touch.
    pub last_touch_timestamp: Timestamp,
}

/// An input event that was not applied, and why. It never carries the
/// event itself (which may hold a raw user id): the source position says
/// where to find it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DeadLetter {
    /// Machine-readable reason.
    pub reason: RejectReason,
    /// Human-readable detail (never the raw user id).
    pub detail: String,
    /// Source: a topic name, `http` or `file`.
    pub source: String,
    /// Source partition.
    pub partition: Option<i32>,
    /// Offset (Kafka), sequence number (HTTP) or end byte offset (file).
    pub offset: Option<i64>,
    /// The event's `event_id`, when it could be read.
    pub event_id: Option<String>,
    /// When the service read the event.
    pub received_at: Timestamp,
}

/// The audit record of one erasure (docs/contract.md, "Erasure records"):
/// who (the user key, never the raw id), when, what was deleted, and which
/// message asked for it. Field order is the contract's.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ErasureRecord {
    /// Pseudonymous user key.
    pub user_key: UserKey,
    /// Open touches deleted.
    pub touches_deleted: u64,
    /// Conversions deleted before they were credited.
    pub conversions_deleted: u64,
    /// The `event_id` of the erase, if it had one.
    pub request_id: Option<String>,
    /// The erase's event time.
    pub requested_at: Timestamp,
    /// When the service applied it.
    pub erased_at: Timestamp,
    /// Source: a topic name, `http` or `file`.
    pub source: String,
    /// Source partition.
    pub partition: Option<i32>,
    /// Offset of the erase message.
    pub offset: Option<i64>,
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The JSON form is the contract's, field for field and in order
    /// (docs/contract.md, "Credit rows"; values invented for the check).
    #[test]
    fn credit_row_json_is_the_contract() {
        let row = CreditRow {
            credit_id: "id".into(),
            conversion_id: "c1".into(),
            user_key: UserKey([0xab; 32]),
            model: ModelId::TimeDecay,
            model_version: None,
            goal: "purchase".into(),
            touch_event_id: Some("t1".into()),
            channel: "email".into(),
            campaign: None,
            interaction: Some(Interaction::View),
            position: 1,
            path_length: 2,
            touch_timestamp: Some(Timestamp(0)),
            conversion_timestamp: Timestamp(1),
            credit: 0.25,
            credited_value: Some(2.5),
            currency: Some("EUR".into()),
        };
        let want = format!(
            r#"{{"credit_id":"id","conversion_id":"c1","user_key":"{}","model":"time_decay","model_version":null,"goal":"purchase","touch_event_id":"t1","channel":"email","campaign":null,"interaction":"view","position":1,"path_length":2,"touch_timestamp":"1970-01-01T00:00:00.000Z","conversion_timestamp":"1970-01-01T00:00:00.001Z","credit":0.25,"credited_value":2.5,"currency":"EUR"}}"#,
            "ab".repeat(32)
        );
        assert_eq!(serde_json::to_string(&row).unwrap(), want);
        assert_eq!(serde_json::from_str::<CreditRow>(&want).unwrap(), row);
    }

    #[test]
    fn dead_letter_json_is_the_contract() {
        let d = DeadLetter {
            reason: RejectReason::InvalidTimestamp,
            detail: "x".into(),
            source: "events".into(),
            partition: Some(3),
            offset: Some(42),
            event_id: None,
            received_at: Timestamp(0),
        };
        let want = r#"{"reason":"invalid_timestamp","detail":"x","source":"events","partition":3,"offset":42,"event_id":null,"received_at":"1970-01-01T00:00:00.000Z"}"#;
        assert_eq!(serde_json::to_string(&d).unwrap(), want);
        assert_eq!(serde_json::from_str::<DeadLetter>(want).unwrap(), d);
    }
}
