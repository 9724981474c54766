//! From journey effects to output rows: credit rows under every model, path
//! rows, the partition's path statistics and the counters that go with them.

use std::collections::HashMap;
use std::time::Instant;

use apportion_contract::{DeadLetter, ErasureRecord, Rejection, Timestamp};
use apportion_engine::datadriven::PathStats;
use apportion_engine::replay::effect_rows;
use apportion_engine::{Effect, Model, Outcome};
use apportion_sinks::OutputBatch;

use crate::metrics::{HotSeries, Metrics};
use crate::source::PartId;

/// Appends the rows of `effects` to `out`, adds closed paths to `stats`
/// (when given: only data-driven models need them), and counts them.
/// `arrivals` maps conversion ids to their arrival time (for the latency
/// histogram).
pub fn emit(
    effects: &[Effect],
    models: &[Box<dyn Model>],
    mut stats: Option<&mut PathStats>,
    arrivals: &mut HashMap<String, Instant>,
    metrics: &Metrics,
    hot: &HotSeries,
    out: &mut OutputBatch,
) {
    for e in effects {
        match e {
            Effect::Journey { outcome, .. } => {
                if let Some((converted, path)) = outcome.closed_path() {
                    if let Some(stats) = stats.as_deref_mut() {
                        let chans: Vec<&str> = path.iter().map(|t| t.channel.as_str()).collect();
                        let overflowed = stats.add_path(&chans, converted);
                        if overflowed > 0 {
                            metrics.stats_overflow_touches.inc_by(overflowed as u64);
                            metrics.stats_overflow_paths.inc();
                        }
                    }
                    hot.paths_closed[converted as usize].inc();
                }
                match outcome {
                    Outcome::Converted { conversion, path } => {
                        hot.journeys_closed[0].inc();
                        hot.conversions[!path.is_empty() as usize].inc();
                        if let Some(t) = arrivals.remove(&conversion.event_id) {
                            metrics.latency.observe(t.elapsed().as_secs_f64());
                        }
                    }
                    Outcome::Expired { .. } => hot.journeys_closed[1].inc(),
                }
            }
            Effect::TouchesDropped { cap, age, .. } => {
                metrics.touches_dropped.with_label_values(&["touch_cap"]).inc_by(*cap as u64);
                metrics.touches_dropped.with_label_values(&["max_age"]).inc_by(*age as u64);
            }
            Effect::Erased { conversion_ids, .. } => {
                hot.journeys_closed[2].inc();
                for id in conversion_ids {
                    arrivals.remove(id);
                }
            }
        }
        let (rows, path) = effect_rows(e, models);
        for r in &rows {
            hot.credit_rows(r.model).inc();
        }
        out.credit.extend(rows);
        out.paths.extend(path);
    }
}

/// The audit record of an erase applied at `offset` of partition `id`, if
/// `effect` is its erasure (contract: Erasure records); `request_id` is
/// the erase's `event_id` (empty: none).
pub fn erasure(
    id: &PartId,
    offset: i64,
    effect: &Effect,
    request_id: &str,
    requested_at: i64,
    received_at: i64,
) -> Option<ErasureRecord> {
    let Effect::Erased { user_key, touches, conversion_ids } = effect else { return None };
    Some(ErasureRecord {
        user_key: *user_key,
        touches_deleted: *touches as u64,
        conversions_deleted: conversion_ids.len() as u64,
        request_id: (!request_id.is_empty()).then(|| request_id.to_string()),
        requested_at: Timestamp(requested_at),
        erased_at: Timestamp(received_at),
        source: id.source.clone(),
        partition: Some(id.partition),
        offset: Some(offset),
    })
}

/// The dead letter of a message of partition `id`.
pub fn dead_letter(id: &PartId, offset: i64, r: &Rejection, event_id: Option<String>, received_at: i64) -> DeadLetter {
    DeadLetter {
        reason: r.reason,
        detail: r.detail.clone(),
        source: id.source.clone(),
        partition: Some(id.partition),
        offset: Some(offset),
        event_id,
        received_at: Timestamp(received_at),
    }
}
