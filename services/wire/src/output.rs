//! Credit rows, path rows and dead letters in protobuf. The conversions are
//! field for field; typed values (user key, model, interaction, reason,
//! times) are written in their contract text form, as in JSON, and decoding
//! checks that text.

use apportion_contract::time::parse_rfc3339_ms;
use apportion_contract::{CreditRow, DeadLetter, Interaction, ModelId, PathRow, RejectReason, Timestamp, UserKey};
use prost::Message;

use crate::pb;

/// Encodes a credit row as a protobuf `apportion.v1.CreditRow`.
pub fn encode_credit_protobuf(row: &CreditRow) -> Vec<u8> {
    pb::CreditRow {
        credit_id: row.credit_id.clone(),
        conversion_id: row.conversion_id.clone(),
        user_key: row.user_key.to_hex(),
        model: row.model.as_str().to_string(),
        model_version: row.model_version.clone(),
        goal: row.goal.clone(),
        touch_event_id: row.touch_event_id.clone(),
        channel: row.channel.clone(),
        campaign: row.campaign.clone(),
        interaction: row.interaction.map(|i| i.as_str().to_string()),
        position: row.position,
        path_length: row.path_length,
        touch_timestamp: row.touch_timestamp.map(|t| t.to_string()),
        conversion_timestamp: row.conversion_timestamp.to_string(),
        credit: row.credit,
        credited_value: row.credited_value,
        currency: row.currency.clone(),
    }
    .encode_to_vec()
}

/// Decodes a protobuf `apportion.v1.CreditRow`.
pub fn decode_credit_protobuf(bytes: &[u8]) -> Result<CreditRow, String> {
    let m = pb::CreditRow::decode(bytes).map_err(|e| format!("not a valid protobuf CreditRow: {e}"))?;
    Ok(CreditRow {
        credit_id: m.credit_id,
        conversion_id: m.conversion_id,
        user_key: user_key(&m.user_key)?,
        model: ModelId::parse(&m.model).map_err(|e| e.to_string())?,
        model_version: m.model_version,
        goal: m.goal,
        touch_event_id: m.touch_event_id,
        channel: m.channel,
        campaign: m.campaign,
        interaction: m.interaction.as_deref().map(interaction).transpose()?,
        position: m.position,
        path_length: m.path_length,
        touch_timestamp: m.touch_timestamp.as_deref().map(|t| timestamp("touch_timestamp", t)).transpose()?,
        conversion_timestamp: timestamp("conversion_timestamp", &m.conversion_timestamp)?,
        credit: m.credit,
        credited_value: m.credited_value,
        currency: m.currency,
    })
}

/// Encodes a path row as a protobuf `apportion.v1.PathRow`.
pub fn encode_path_protobuf(row: &PathRow) -> Vec<u8> {
    pb::PathRow {
        path_id: row.path_id.clone(),
        user_key: row.user_key.to_hex(),
        converted: row.converted,
        conversion_id: row.conversion_id.clone(),
        goal: row.goal.clone(),
        channels: row.channels.clone(),
        touch_count: row.touch_count,
        first_touch_timestamp: row.first_touch_timestamp.to_string(),
        last_touch_timestamp: row.last_touch_timestamp.to_string(),
    }
    .encode_to_vec()
}

/// Decodes a protobuf `apportion.v1.PathRow`.
pub fn decode_path_protobuf(bytes: &[u8]) -> Result<PathRow, String> {
    let m = pb::PathRow::decode(bytes).map_err(|e| format!("not a valid protobuf PathRow: {e}"))?;
    Ok(PathRow {
        path_id: m.path_id,
        user_key: user_key(&m.user_key)?,
        converted: m.converted,
        conversion_id: m.conversion_id,
        goal: m.goal,
        channels: m.channels,
        touch_count: m.touch_count,
        first_touch_timestamp: timestamp("first_touch_timestamp", &m.first_touch_timestamp)?,
        last_touch_timestamp: timestamp("last_touch_timestamp", &m.last_touch_timestamp)?,
    })
}

/// Encodes a dead letter as a protobuf `apportion.v1.DeadLetter`.
pub fn encode_dead_letter_protobuf(d: &DeadLetter) -> Vec<u8> {
    pb::DeadLetter {
        reason: d.reason.code().to_string(),
        detail: d.detail.clone(),
        source: d.source.clone(),
        partition: d.partition,
        offset: d.offset,
        event_id: d.event_id.clone(),
        received_at: d.received_at.to_string(),
    }
    .encode_to_vec()
}

/// Decodes a protobuf `apportion.v1.DeadLetter`.
pub fn decode_dead_letter_protobuf(bytes: &[u8]) -> Result<DeadLetter, String> {
    let m = pb::DeadLetter::decode(bytes).map_err(|e| format!("not a valid protobuf DeadLetter: {e}"))?;
    Ok(DeadLetter {
        reason: RejectReason::from_code(&m.reason).ok_or_else(|| format!("unknown reason {:?}", m.reason))?,
        detail: m.detail,
        source: m.source,
        partition: m.partition,
        offset: m.offset,
        event_id: m.event_id,
        received_at: timestamp("received_at", &m.received_at)?,
    })
}

fn user_key(hex: &str) -> Result<UserKey, String> {
    UserKey::from_hex(hex).ok_or_else(|| format!("user_key is not 64 hex digits: {hex:?}"))
}

fn interaction(s: &str) -> Result<Interaction, String> {
    match s {
        "click" => Ok(Interaction::Click),
        "view" => Ok(Interaction::View),
        other => Err(format!("interaction must be click or view, got {other:?}")),
    }
}

fn timestamp(field: &str, s: &str) -> Result<Timestamp, String> {
    parse_rfc3339_ms(s).map(Timestamp).ok_or_else(|| format!("{field} is not an RFC 3339 time: {s:?}"))
}
