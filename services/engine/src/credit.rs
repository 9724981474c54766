//! Building credit rows and path rows (docs/contract.md, "Credit rows" and
//! "Path rows") from a journey outcome.

use apportion_contract::{CreditRow, ModelId, PathRow, Timestamp, UserKey, UNATTRIBUTED};
use sha2::{Digest, Sha256};

use crate::journey::{Conversion, Touch};
use crate::model::Model;

/// The deterministic `credit_id`: the first 128 bits of
/// SHA-256(conversion_id 0x00 model 0x00 position), as hex. The same input
/// always gives the same id, so sinks can deduplicate re-deliveries.
pub fn credit_id(conversion_id: &str, model: ModelId, position: u32) -> String {
    let mut h = Sha256::new();
    h.update(conversion_id.as_bytes());
    h.update([0u8]);
    h.update(model.as_str().as_bytes());
    h.update([0u8]);
    h.update(position.to_string().as_bytes());
    hex::encode(&h.finalize()[..16])
}

/// Credit rows of one conversion under one model: one row per touch of the
/// eligible path (zeros included), or the single `unattributed` row.
pub fn credit_rows(user_key: &UserKey, conversion: &Conversion, path: &[Touch], model: &dyn Model) -> Vec<CreditRow> {
    let user_key = *user_key;
    let conversion_timestamp = Timestamp(conversion.ts);
    let name = model.id();
    let version = model.version().map(str::to_string);
    let value_of = |credit: f64| conversion.value.map(|v| credit * v);
    if path.is_empty() {
        return vec![CreditRow {
            credit_id: credit_id(&conversion.event_id, name, 0),
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
                credit_id: credit_id(&conversion.event_id, name, position),
                conversion_id: conversion.event_id.clone(),
                user_key,
                model: name,
                model_version: version.clone(),
                goal: conversion.goal.clone(),
                touch_event_id: Some(t.event_id.clone()),
                channel: t.channel.clone(),
                campaign: t.campaign.clone(),
                interaction: Some(t.interaction),
                position,
                path_length: n,
                touch_timestamp: Some(Timestamp(t.ts)),
                conversion_timestamp,
                credit: w,
                credited_value: value_of(w),
                currency: conversion.currency.clone(),
            }
        })
        .collect()
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
        user_key: *user_key,
        converted: conversion.is_some(),
        conversion_id: conversion.map(|c| c.event_id.clone()),
        goal: conversion.map(|c| c.goal.clone()),
        channels: path.iter().map(|t| t.channel.clone()).collect(),
        touch_count: path.len() as u32,
        first_touch_timestamp: Timestamp(first.ts),
        last_touch_timestamp: Timestamp(last.ts),
    }
}
