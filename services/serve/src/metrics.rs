//! Every metric of the service, in one place (docs/telemetry.md is the
//! written spec; a test checks that the two agree).
//!
//! Rules: base units, `_total` counters, `_seconds` histograms, label values
//! from small fixed sets only (never a user, event id or campaign). Metrics
//! are registered on an injected registry and updated per batch.

use prometheus::{
    Encoder, GaugeVec, Histogram, HistogramOpts, IntCounter, IntCounterVec, IntGauge, IntGaugeVec, Opts, Registry,
    TextEncoder,
};

use apportion_contract::{ModelId, RejectReason};

/// Event types used as label values.
pub const EVENT_TYPES: [&str; 4] = ["touch", "conversion", "erase", "unknown"];
/// Event outcomes used as label values.
pub const OUTCOMES: [&str; 5] = ["accepted", "rejected", "duplicate", "late_dropped", "late_applied"];

/// The service's metrics.
#[derive(Clone)]
pub struct Metrics {
    /// The registry they live on.
    pub registry: Registry,
    /// apportion_ready.
    pub ready: IntGauge,
    /// apportion_events_consumed_total{type,outcome}.
    pub events_consumed: IntCounterVec,
    /// apportion_events_rejected_total{reason}.
    pub events_rejected: IntCounterVec,
    /// apportion_events_late_total{action}.
    pub events_late: IntCounterVec,
    /// apportion_journeys_open.
    pub journeys_open: IntGauge,
    /// apportion_dedupe_remembered_ids.
    pub dedupe_ids: IntGauge,
    /// apportion_journeys_closed_total{reason}.
    pub journeys_closed: IntCounterVec,
    /// apportion_journey_touches_dropped_total{reason}.
    pub touches_dropped: IntCounterVec,
    /// apportion_ingest_requests_refused_total{reason}.
    pub ingest_refused: IntCounterVec,
    /// apportion_credit_rows_total{model}.
    pub credit_rows: IntCounterVec,
    /// apportion_conversions_credited_total{attributed}.
    pub conversions: IntCounterVec,
    /// apportion_paths_closed_total{converted}.
    pub paths_closed: IntCounterVec,
    /// apportion_path_stats_overflow_touches_total.
    pub stats_overflow_touches: IntCounter,
    /// apportion_path_stats_overflow_paths_total.
    pub stats_overflow_paths: IntCounter,
    /// apportion_path_stats_channels.
    pub stats_channels: IntGauge,
    /// apportion_processing_latency_seconds.
    pub latency: Histogram,
    /// apportion_batch_duration_seconds.
    pub batch_duration: Histogram,
    /// apportion_batch_limit_events.
    pub batch_limit: IntGauge,
    /// apportion_watermark_lag_seconds{topic,partition}.
    pub watermark_lag: GaugeVec,
    /// apportion_consumer_lag_messages{topic,partition}.
    pub consumer_lag: IntGaugeVec,
    /// apportion_changelog_records_total{direction}.
    pub changelog_records: IntCounterVec,
    /// apportion_changelog_publish_failures_total.
    pub changelog_failures: IntCounter,
    /// apportion_batches_refused_total.
    pub batches_refused: IntCounter,
    /// apportion_changelog_restoring_partitions.
    pub changelog_restoring: IntGauge,
    /// apportion_changelog_restore_remaining_records.
    pub changelog_remaining: IntGauge,
    /// apportion_events_without_consent_total{type}.
    pub events_without_consent: IntCounterVec,
    /// apportion_store_size_bytes.
    pub store_size: IntGauge,
    /// apportion_state_oldest_event_age_seconds.
    pub state_oldest_age: IntGauge,
    /// apportion_processing_last_turn_timestamp_seconds.
    pub loop_turn: IntGauge,
    /// apportion_store_disk_available_bytes.
    pub disk_available: IntGauge,
    /// apportion_model_last_refit_timestamp_seconds{model}.
    pub refit_time: GaugeVec,
    /// apportion_model_last_refit_duration_seconds{model}.
    pub refit_duration: GaugeVec,
    /// apportion_model_refit_failures_total{model}.
    pub refit_failures: IntCounterVec,
    /// apportion_model_refit_missing_partitions.
    pub refit_missing: IntGauge,
    /// apportion_sink_rows_total{sink,kind}.
    pub sink_rows: IntCounterVec,
    /// apportion_sink_errors_total{sink}.
    pub sink_errors: IntCounterVec,
    /// apportion_sink_retries_total{sink}.
    pub sink_retries: IntCounterVec,
    _build: IntGaugeVec,
}

/// The series the per-event and per-row paths update, looked up once: a
/// lookup by label values hashes the values and takes the vector's lock
/// every time (1.6 % of serve's samples plus the locks, load/RESULTS.md
/// section 10). Each is the same series as its vector's.
#[derive(Clone)]
pub struct HotSeries {
    /// apportion_events_consumed_total{type=touch|conversion|erase,outcome=accepted}.
    pub accepted: [IntCounter; 3],
    /// apportion_credit_rows_total{model}, in [`ModelId::ALL`] order.
    pub credit_rows: Vec<IntCounter>,
    /// apportion_paths_closed_total{converted=false|true}.
    pub paths_closed: [IntCounter; 2],
    /// apportion_conversions_total{attributed=false|true}.
    pub conversions: [IntCounter; 2],
    /// apportion_journeys_closed_total{reason=converted|expired|erased}.
    pub journeys_closed: [IntCounter; 3],
}

impl HotSeries {
    /// The series of `m`.
    pub fn new(m: &Metrics) -> Self {
        let accepted = |t: &str| m.events_consumed.with_label_values(&[t, "accepted"]);
        let tf = |v: &IntCounterVec| [v.with_label_values(&["false"]), v.with_label_values(&["true"])];
        let closed = |r: &str| m.journeys_closed.with_label_values(&[r]);
        HotSeries {
            accepted: [accepted("touch"), accepted("conversion"), accepted("erase")],
            credit_rows: ModelId::ALL.iter().map(|id| m.credit_rows.with_label_values(&[id.as_str()])).collect(),
            paths_closed: tf(&m.paths_closed),
            conversions: tf(&m.conversions),
            journeys_closed: [closed("converted"), closed("expired"), closed("erased")],
        }
    }

    /// The accepted-events series of an event type.
    pub fn accepted(&self, kind: apportion_contract::EventKind) -> &IntCounter {
        use apportion_contract::EventKind;
        &self.accepted[match kind {
            EventKind::Touch => 0,
            EventKind::Conversion => 1,
            EventKind::Erase => 2,
        }]
    }

    /// The credit-rows series of a model.
    pub fn credit_rows(&self, model: ModelId) -> &IntCounter {
        let i = ModelId::ALL.iter().position(|m| *m == model).expect("every model is in ModelId::ALL");
        &self.credit_rows[i]
    }
}

fn counter(r: &Registry, name: &str, help: &str, labels: &[&str]) -> IntCounterVec {
    let c = IntCounterVec::new(Opts::new(name, help), labels).expect("valid metric");
    r.register(Box::new(c.clone())).expect("metric registered once");
    c
}

impl Metrics {
    /// Registers every metric on `registry` and pre-creates every label
    /// combination, so series exist (at 0) from the start.
    pub fn new(registry: Registry) -> Metrics {
        let r = &registry;
        let gauge = |name: &str, help: &str| {
            let g = IntGauge::new(name, help).expect("valid metric");
            r.register(Box::new(g.clone())).expect("registered once");
            g
        };
        let plain_counter = |name: &str, help: &str| {
            let c = IntCounter::new(name, help).expect("valid metric");
            r.register(Box::new(c.clone())).expect("registered once");
            c
        };
        let fgauge_vec = |name: &str, help: &str, labels: &[&str]| {
            let g = GaugeVec::new(Opts::new(name, help), labels).expect("valid metric");
            r.register(Box::new(g.clone())).expect("registered once");
            g
        };
        let build = IntGaugeVec::new(Opts::new("apportion_build_info", "Build information; always 1."), &["version"])
            .expect("valid metric");
        r.register(Box::new(build.clone())).expect("registered once");
        build.with_label_values(&[env!("CARGO_PKG_VERSION")]).set(1);

        let latency = Histogram::with_opts(
            HistogramOpts::new(
                "apportion_processing_latency_seconds",
                "Time from the arrival of a conversion event to its credit rows being produced.",
            )
            .buckets(vec![
                0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 5.25, 5.5, 7.5, 10.0, 30.0, 60.0, 120.0, 300.0,
            ]),
        )
        .expect("valid metric");
        r.register(Box::new(latency.clone())).expect("registered once");
        let batch_duration = Histogram::with_opts(
            HistogramOpts::new(
                "apportion_batch_duration_seconds",
                "Time to process one input batch: apply, write to sinks, commit the store.",
            )
            .buckets(vec![0.001, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0]),
        )
        .expect("valid metric");
        r.register(Box::new(batch_duration.clone())).expect("registered once");
        let watermark_lag = fgauge_vec(
            "apportion_watermark_lag_seconds",
            "Processing time minus the partition's watermark.",
            &["topic", "partition"],
        );
        let consumer_lag = IntGaugeVec::new(
            Opts::new(
                "apportion_consumer_lag_messages",
                "Messages between the partition's end and the consumer's position.",
            ),
            &["topic", "partition"],
        )
        .expect("valid metric");
        r.register(Box::new(consumer_lag.clone())).expect("registered once");

        let m = Metrics {
            ready: gauge("apportion_ready", "1 when the service is ready: store open and partitions assigned."),
            events_consumed: counter(
                r,
                "apportion_events_consumed_total",
                "Input events consumed, by type and outcome.",
                &["type", "outcome"],
            ),
            events_rejected: counter(
                r,
                "apportion_events_rejected_total",
                "Input events sent to the dead-letter output, by reason.",
                &["reason"],
            ),
            events_late: counter(
                r,
                "apportion_events_late_total",
                "Events older than the watermark, by what was done with them.",
                &["action"],
            ),
            events_without_consent: counter(
                r,
                "apportion_events_without_consent_total",
                "Events dropped unread because their consent.measurement is false, by type.",
                &["type"],
            ),
            journeys_open: gauge("apportion_journeys_open", "Open journeys held in the store."),
            dedupe_ids: gauge(
                "apportion_dedupe_remembered_ids",
                "Event ids held in memory for duplicate detection (about 40 bytes each).",
            ),
            journeys_closed: counter(r, "apportion_journeys_closed_total", "Journeys closed, by reason.", &["reason"]),
            ingest_refused: counter(
                r,
                "apportion_ingest_requests_refused_total",
                "HTTP ingest requests refused before anything of them was applied, by reason.",
                &["reason"],
            ),
            touches_dropped: counter(
                r,
                "apportion_journey_touches_dropped_total",
                "Touches dropped from open journeys, by reason (touch_cap: max_touches_per_journey; max_age: max_touch_age).",
                &["reason"],
            ),
            credit_rows: counter(r, "apportion_credit_rows_total", "Credit rows emitted, by model.", &["model"]),
            conversions: counter(
                r,
                "apportion_conversions_credited_total",
                "Conversions credited, by whether any touch was eligible.",
                &["attributed"],
            ),
            paths_closed: counter(
                r,
                "apportion_paths_closed_total",
                "Closed paths, converting or not.",
                &["converted"],
            ),
            stats_overflow_touches: plain_counter(
                "apportion_path_stats_overflow_touches_total",
                "Touches of closed paths counted in the overflow bucket of the path statistics (max_channels).",
            ),
            stats_overflow_paths: plain_counter(
                "apportion_path_stats_overflow_paths_total",
                "Closed paths with at least one touch counted in the overflow bucket (max_channels).",
            ),
            stats_channels: gauge(
                "apportion_path_stats_channels",
                "Distinct channels (overflow bucket included) in the largest path statistics of an open partition.",
            ),
            latency,
            batch_duration,
            batch_limit: gauge(
                "apportion_batch_limit_events",
                "Events asked of the source for the next batch (grows under a backlog up to max_batch_size).",
            ),
            watermark_lag,
            consumer_lag,
            store_size: gauge("apportion_store_size_bytes", "Size of the sled store on disk."),
            loop_turn: gauge(
                "apportion_processing_last_turn_timestamp_seconds",
                "Unix time at which the processing loop last started a turn (it turns at least every few seconds while it works).",
            ),
            state_oldest_age: gauge(
                "apportion_state_oldest_event_age_seconds",
                "Wall-clock age, at the last state scan, of the oldest event held in a stored journey (0: none).",
            ),
            disk_available: gauge(
                "apportion_store_disk_available_bytes",
                "Free bytes on the data directory's filesystem.",
            ),
            refit_time: fgauge_vec(
                "apportion_model_last_refit_timestamp_seconds",
                "Unix time of the last successful refit.",
                &["model"],
            ),
            refit_duration: fgauge_vec(
                "apportion_model_last_refit_duration_seconds",
                "Duration of the last refit.",
                &["model"],
            ),
            refit_failures: counter(r, "apportion_model_refit_failures_total", "Failed refits.", &["model"]),
            refit_missing: gauge(
                "apportion_model_refit_missing_partitions",
                "Input partitions without shared statistics for the last refit round (fitted on this instance's or older values).",
            ),
            sink_rows: counter(r, "apportion_sink_rows_total", "Rows written, by sink and kind.", &["sink", "kind"]),
            sink_errors: counter(r, "apportion_sink_errors_total", "Sink and producer errors.", &["sink"]),
            sink_retries: counter(r, "apportion_sink_retries_total", "Batches retried at a sink.", &["sink"]),
            changelog_records: counter(
                r,
                "apportion_changelog_records_total",
                "State records published to the changelog topics, or read from them to restore a partition.",
                &["direction"],
            ),
            changelog_failures: plain_counter(
                "apportion_changelog_publish_failures_total",
                "Commits the changelog did not take, or batch transactions aborted (retried with backoff).",
            ),
            batches_refused: plain_counter(
                "apportion_batches_refused_total",
                "Batches whose transaction the consumer group refused (the group moved on since they were read): rolled back and read again.",
            ),
            changelog_restoring: gauge(
                "apportion_changelog_restoring_partitions",
                "Partitions being restored from their changelog (the service is not ready meanwhile).",
            ),
            changelog_remaining: gauge(
                "apportion_changelog_restore_remaining_records",
                "Changelog records left to read by the restore in progress (0: none in progress).",
            ),
            _build: build,
            registry,
        };
        for t in EVENT_TYPES {
            for o in OUTCOMES {
                m.events_consumed.with_label_values(&[t, o]);
            }
        }
        for r in RejectReason::ALL {
            m.events_rejected.with_label_values(&[r.code()]);
        }
        for t in ["touch", "conversion"] {
            m.events_without_consent.with_label_values(&[t]);
        }
        for d in ["published", "restored"] {
            m.changelog_records.with_label_values(&[d]);
        }
        for a in ["dropped", "applied"] {
            m.events_late.with_label_values(&[a]);
        }
        for r in ["converted", "expired", "erased"] {
            m.journeys_closed.with_label_values(&[r]);
        }
        for r in ["touch_cap", "max_age"] {
            m.touches_dropped.with_label_values(&[r]);
        }
        for r in ["unauthorized", "too_large", "queue_full"] {
            m.ingest_refused.with_label_values(&[r]);
        }
        for model in ModelId::ALL {
            m.credit_rows.with_label_values(&[model.as_str()]);
        }
        for model in ModelId::DATA_DRIVEN {
            m.refit_failures.with_label_values(&[model.as_str()]);
        }
        for b in ["true", "false"] {
            m.conversions.with_label_values(&[b]);
            m.paths_closed.with_label_values(&[b]);
        }
        m
    }

    /// Pre-creates the series of one sink.
    pub fn register_sink(&self, sink: &str) {
        for k in ["credit", "path", "dead_letter", "erasure"] {
            self.sink_rows.with_label_values(&[sink, k]);
        }
        self.sink_errors.with_label_values(&[sink]);
        self.sink_retries.with_label_values(&[sink]);
    }

    /// The Prometheus text exposition.
    pub fn render(&self) -> String {
        let mut buf = Vec::new();
        TextEncoder::new().encode(&self.registry.gather(), &mut buf).expect("text encoding");
        String::from_utf8(buf).expect("UTF-8 exposition")
    }
}

/// What the sinks' layers report to: the metrics, and the stop flag that
/// ends their retries at shutdown.
#[derive(Clone)]
pub struct SinkObserver {
    /// Metrics of retries and failures.
    pub metrics: Metrics,
    /// Set when the service is stopping.
    pub stop: std::sync::Arc<std::sync::atomic::AtomicBool>,
    /// When the shutdown grace ends (set with `stop`).
    pub deadline: std::sync::Arc<std::sync::Mutex<Option<std::time::Instant>>>,
}

impl apportion_sinks::Observer for SinkObserver {
    fn failed(&self, sink: &'static str) {
        self.metrics.sink_errors.with_label_values(&[sink]).inc();
    }
    fn retried(&self, sink: &'static str) {
        self.metrics.sink_retries.with_label_values(&[sink]).inc();
    }
    fn cancelled(&self) -> bool {
        self.stop.load(std::sync::atomic::Ordering::SeqCst)
    }
    fn deadline(&self) -> Option<std::time::Instant> {
        *self.deadline.lock().expect("deadline")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Each pre-resolved series is the labelled series of its vector
    /// (the label values named in docs/telemetry.md).
    #[test]
    fn hot_series_are_the_labelled_series() {
        use apportion_contract::EventKind;
        let m = Metrics::new(Registry::new());
        let h = HotSeries::new(&m);
        h.accepted(EventKind::Touch).inc();
        h.accepted(EventKind::Conversion).inc_by(2);
        h.accepted(EventKind::Erase).inc_by(3);
        for (i, id) in ModelId::ALL.iter().enumerate() {
            h.credit_rows(*id).inc_by(i as u64 + 10);
        }
        h.paths_closed[1].inc_by(4);
        h.conversions[0].inc_by(5);
        h.journeys_closed[1].inc_by(6);
        let get = |v: &IntCounterVec, l: &[&str]| v.with_label_values(l).get();
        assert_eq!(get(&m.events_consumed, &["touch", "accepted"]), 1);
        assert_eq!(get(&m.events_consumed, &["conversion", "accepted"]), 2);
        assert_eq!(get(&m.events_consumed, &["erase", "accepted"]), 3);
        for (i, id) in ModelId::ALL.iter().enumerate() {
            assert_eq!(get(&m.credit_rows, &[id.as_str()]), i as u64 + 10);
        }
        assert_eq!(get(&m.paths_closed, &["true"]), 4);
        assert_eq!(get(&m.conversions, &["false"]), 5);
        assert_eq!(get(&m.journeys_closed, &["expired"]), 6);
        assert_eq!(get(&m.journeys_closed, &["converted"]), 0);
    }

    /// Every metric in docs/telemetry.md is exposed, and nothing else.
    #[test]
    fn exposition_matches_the_written_spec() {
        let spec = include_str!("../../../docs/telemetry.md");
        let m = Metrics::new(Registry::new());
        m.register_sink("kafka");
        m.watermark_lag.with_label_values(&["events", "0"]).set(1.0);
        m.consumer_lag.with_label_values(&["events", "0"]).set(1);
        m.refit_time.with_label_values(&["shapley"]).set(1.0);
        m.refit_duration.with_label_values(&["shapley"]).set(1.0);
        let text = m.render();
        let exposed: std::collections::BTreeSet<String> = text
            .lines()
            .filter_map(|l| l.strip_prefix("# TYPE "))
            .map(|l| l.split_whitespace().next().unwrap().to_string())
            .collect();
        let documented: std::collections::BTreeSet<String> = spec
            .split(|c: char| !(c.is_ascii_alphanumeric() || c == '_'))
            .filter(|w| w.starts_with("apportion_") && w.len() > "apportion_".len())
            .filter(|w| !w.ends_with("_bucket") && !w.ends_with("_sum") && !w.ends_with("_count"))
            .map(str::to_string)
            .collect();
        for e in &exposed {
            assert!(documented.contains(e), "{e} is exposed but not in docs/telemetry.md");
        }
        for d in &documented {
            assert!(exposed.contains(d), "{d} is in docs/telemetry.md but not exposed");
        }
        // Histogram buckets as written in the spec.
        for (name, line) in [
            (
                "apportion_processing_latency_seconds",
                spec.lines()
                    .skip_while(|l| !l.contains("### `apportion_processing_latency_seconds`"))
                    .find(|l| l.starts_with("- buckets:")),
            ),
            (
                "apportion_batch_duration_seconds",
                spec.lines()
                    .skip_while(|l| !l.contains("### `apportion_batch_duration_seconds`"))
                    .find(|l| l.starts_with("- buckets:")),
            ),
        ] {
            let line = line.unwrap_or_else(|| panic!("no buckets line for {name} in the spec"));
            let want: Vec<String> =
                line.trim_start_matches("- buckets:").split(',').map(|b| b.trim().to_string()).collect();
            let got: Vec<String> = text
                .lines()
                .filter(|l| l.starts_with(&format!("{name}_bucket{{le=")) && !l.contains("+Inf"))
                .map(|l| l.split('"').nth(1).unwrap().to_string())
                .collect();
            assert_eq!(got, want, "{name} buckets differ from docs/telemetry.md");
        }
    }
}
