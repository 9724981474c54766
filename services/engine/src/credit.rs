//! Credit rows and path rows (docs/contract.md, "Credit rows" and "Path rows").

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

use crate::journey::{Conversion, Touch};
use crate::model::Model;
use crate::pseudonym::UserKey;
use crate::time_fmt::format_ms;

/// Channel name of the single row of a conversion with no eligible touch.
pub const UNATTRIBUTED: &str = "unattributed";

/// One credit row of the output contract. Field order is the contract's.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CreditRow {
    /// Deterministic id from (conversion_id, model, position).
    pub credit_id: String,
    /// The conversion's `event_id`.
    pub conversion_id: String,
    /// Pseudonymous user key (hex).
    pub user_key: String,
    /// Model name.
    pub model: String,
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
    /// `click` / `view`.
    pub interaction: Option<String>,
    /// 1-based position in the eligible path (0 for `unattributed`).
    pub position: u32,
    /// Number of eligible touches (0 for `unattributed`).
    pub path_length: u32,
    /// RFC 3339 time of the touch.
    pub touch_timestamp: Option<String>,
    /// RFC 3339 time of the conversion.
    pub conversion_timestamp: String,
    /// Fraction of the conversion.
    pub credit: f64,
    /// `credit * value` when the conversion has a value.
    pub credited_value: Option<f64>,
    /// ISO 4217 currency of the value.
    pub currency: Option<String>,
}

/// The deterministic `credit_id`: the first 128 bits of
/// SHA-256(conversion_id 0x00 model 0x00 position), as hex. The same input
/// always gives the same id, so sinks can deduplicate re-deliveries.
pub fn credit_id(conversion_id: &str, model: &str, position: u32) -> String {
    let mut h = Sha256::new();
    h.update(conversion_id.as_bytes());
    h.update([0u8]);
    h.update(model.as_bytes());
    h.update([0u8]);
    h.update(position.to_string().as_bytes());
    hex::encode(&h.finalize()[..16])
}

/// Credit rows of one conversion under one model: one row per touch of the
/// eligible path (zeros included), or the single `unattributed` row.
pub fn credit_rows(user_key: &UserKey, conversion: &Conversion, path: &[Touch], model: &dyn Model) -> Vec<CreditRow> {
    let user_key = user_key.to_hex();
    let conversion_timestamp = format_ms(conversion.ts);
    let name = model.name().to_string();
    let version = model.version().map(str::to_string);
    let value_of = |credit: f64| conversion.value.map(|v| credit * v);
    if path.is_empty() {
        return vec![CreditRow {
            credit_id: credit_id(&conversion.event_id, &name, 0),
            conversion_id: conversion.event_id.clone(),
            user_key,
            model: name,
            model_version: version,
            goal: conversion.goal.clone(),
            touch_event_id: None,
            channel: UNATTRIBUTED.to_string(),
            campaign: None,
            interaction: None,
            position: 0,
            path_length: 0,
            touch_timestamp: None,
            conversion_timestamp,
            credit: 1.0,
            credited_value: value_of(1.0),
            currency: conversion.currency.clone(),
        }];
    }
    let weights = model.credit(path, conversion.ts);
    debug_assert_eq!(weights.len(), path.len());
    let n = path.len() as u32;
    path.iter()
        .zip(weights)
        .enumerate()
        .map(|(i, (t, w))| {
            let position = i as u32 + 1;
            CreditRow {
                credit_id: credit_id(&conversion.event_id, &name, position),
                conversion_id: conversion.event_id.clone(),
                user_key: user_key.clone(),
                model: name.clone(),
                model_version: version.clone(),
                goal: conversion.goal.clone(),
                touch_event_id: Some(t.event_id.clone()),
                channel: t.channel.clone(),
                campaign: t.campaign.clone(),
                interaction: Some(t.interaction.as_str().to_string()),
                position,
                path_length: n,
                touch_timestamp: Some(format_ms(t.ts)),
                conversion_timestamp: conversion_timestamp.clone(),
                credit: w,
                credited_value: value_of(w),
                currency: conversion.currency.clone(),
            }
        })
        .collect()
}

/// One closed path (converting or not): the input of the data-driven models
/// and a row of the paths output.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PathRow {
    /// Deterministic id: the conversion id for converting paths, else
    /// derived from the user key and the first touch.
    pub path_id: String,
    /// Pseudonymous user key (hex).
    pub user_key: String,
    /// True when the path ended in a conversion.
    pub converted: bool,
    /// The conversion's `event_id` (converting paths).
    pub conversion_id: Option<String>,
    /// The conversion's goal (converting paths).
    pub goal: Option<String>,
    /// Channel sequence in time order.
    pub channels: Vec<String>,
    /// Number of touches.
    pub touch_count: u32,
    /// RFC 3339 time of the first touch.
    pub first_touch_timestamp: String,
    /// RFC 3339 time of the last touch.
    pub last_touch_timestamp: String,
}

/// Builds the path row of a closed path (`path` must not be empty).
pub fn path_row(user_key: &UserKey, conversion: Option<&Conversion>, path: &[Touch]) -> PathRow {
    let first = &path[0];
    let last = &path[path.len() - 1];
    let path_id = match conversion {
        Some(c) => format!("c:{}", c.event_id),
        None => {
            let mut h = Sha256::new();
            h.update(user_key.0);
            h.update(first.event_id.as_bytes());
            format!("n:{}", hex::encode(&h.finalize()[..16]))
        }
    };
    PathRow {
        path_id,
        user_key: user_key.to_hex(),
        converted: conversion.is_some(),
        conversion_id: conversion.map(|c| c.event_id.clone()),
        goal: conversion.map(|c| c.goal.clone()),
        channels: path.iter().map(|t| t.channel.clone()).collect(),
        touch_count: path.len() as u32,
        first_touch_timestamp: format_ms(first.ts),
        last_touch_timestamp: format_ms(last.ts),
    }
}
