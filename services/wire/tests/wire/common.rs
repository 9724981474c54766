//! Shared fixtures: a small day of events of the example trail shop.

use apportion_engine::{ModelId, ModelPlan};

/// Every model of the contract: the five rule models with default
/// parameters, and both data-driven models (fitted on a first pass).
pub fn all_models() -> ModelPlan {
    ModelPlan { ids: ModelId::ALL.to_vec(), ..ModelPlan::rules() }
}

/// Valid events: several customers, touches (click and view, with and
/// without campaign), conversions with and without value, a duplicate, a
/// conversion with no touch, a non-converting journey and erases (by raw
/// id and by user key).
/// Timestamps come in both contract forms (RFC 3339 and epoch ms).
pub const VALID: &[&str] = &[
    r#"{"type":"touch","event_id":"t-001","user_id":"cust-1001","timestamp":"2026-03-01T09:00:00Z","channel":"paid_search","campaign":"spring-tents"}"#,
    // 2026-03-02T18:30:00Z in epoch ms.
    r#"{"type":"touch","event_id":"t-002","user_id":"cust-1001","timestamp":1772476200000,"channel":"email","interaction":"view"}"#,
    r#"{"type":"touch","event_id":"t-003","user_id":"cust-1001","timestamp":"2026-03-03T08:15:00.250+01:00","channel":"social","campaign":null,"interaction":"click"}"#,
    r#"{"type":"conversion","event_id":"c-001","user_id":"cust-1001","timestamp":"2026-03-03T12:00:00Z","goal":"purchase","value":189.5,"currency":"EUR"}"#,
    // Duplicate of t-001: dropped by both paths.
    r#"{"type":"touch","event_id":"t-001","user_id":"cust-1001","timestamp":"2026-03-01T09:00:00Z","channel":"paid_search","campaign":"spring-tents"}"#,
    r#"{"type":"touch","event_id":"t-101","user_id":"cust-1002","timestamp":"2026-03-01T10:00:00Z","channel":"social","interaction":"view"}"#,
    r#"{"type":"touch","event_id":"t-102","user_id":"cust-1002","timestamp":"2026-03-02T10:00:00Z","channel":"paid_search","campaign":"rain-shells"}"#,
    r#"{"type":"touch","event_id":"t-103","user_id":"cust-1002","timestamp":"2026-03-04T10:00:00Z","channel":"email"}"#,
    r#"{"type":"conversion","event_id":"c-101","user_id":"cust-1002","timestamp":"2026-03-04T11:00:00Z","goal":"signup"}"#,
    r#"{"type":"touch","event_id":"t-104","user_id":"cust-1002","timestamp":"2026-03-05T09:00:00Z","channel":"affiliate","unknown_extra":{"nested":[1,2]}}"#,
    r#"{"type":"conversion","event_id":"c-102","user_id":"cust-1002","timestamp":"2026-03-05T09:30:00Z","value":120,"currency":"USD"}"#,
    // Non-converting journey, closed at end of input.
    r#"{"type":"touch","event_id":"t-201","user_id":"cust-1003","timestamp":"2026-03-02T07:00:00Z","channel":"display","interaction":"view"}"#,
    r#"{"type":"touch","event_id":"t-202","user_id":"cust-1003","timestamp":"2026-03-02T07:05:00Z","channel":"paid_search"}"#,
    // Conversion with no touch: the single unattributed row.
    r#"{"type":"conversion","event_id":"c-301","user_id":"cust-1004","timestamp":"2026-03-03T15:00:00Z","goal":"purchase","value":0,"currency":"EUR"}"#,
    // Erase (no event_id) forgets cust-1005's touch before the conversion.
    r#"{"type":"touch","event_id":"t-401","user_id":"cust-1005","timestamp":"2026-03-01T12:00:00Z","channel":"email"}"#,
    r#"{"type":"erase","user_id":"cust-1005","timestamp":"2026-03-02T00:00:00Z"}"#,
    r#"{"type":"touch","event_id":"t-402","user_id":"cust-1005","timestamp":"2026-03-02T12:00:00Z","channel":"social"}"#,
    r#"{"type":"conversion","event_id":"c-401","user_id":"cust-1005","timestamp":"2026-03-02T13:00:00Z","goal":"purchase","value":64.99,"currency":"GBP"}"#,
    // Erase with an event_id is accepted too.
    r#"{"type":"erase","event_id":"e-501","user_id":"cust-1006","timestamp":0}"#,
    // No consent to measurement: counted and dropped by both paths; stated
    // consent and unknown consent keys change nothing.
    r#"{"type":"touch","event_id":"t-701","user_id":"cust-1007","timestamp":"2026-03-01T12:00:00Z","channel":"email","consent":{"measurement":false}}"#,
    r#"{"type":"touch","event_id":"t-702","user_id":"cust-1007","timestamp":"2026-03-01T13:00:00Z","channel":"social","consent":{"measurement":true}}"#,
    r#"{"type":"conversion","event_id":"c-701","user_id":"cust-1007","timestamp":"2026-03-01T14:00:00Z","consent":{}}"#,
    // Erase naming its user by key (64 lowercase hex digits) instead of raw id.
    r#"{"type":"erase","event_id":"e-601","user_key":"00112233445566778899aabbccddeeff00112233445566778899aabbccddeeff","timestamp":0}"#,
];

/// A string of `n` ASCII bytes.
pub fn bytes(n: usize) -> String {
    "x".repeat(n)
}
