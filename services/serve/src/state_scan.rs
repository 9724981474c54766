//! The periodic scan behind `apportion_state_oldest_event_age_seconds`: how
//! old the oldest event held in any stored journey is (contract: Journey
//! rules, "How long state is kept"). Reading every journey record takes
//! time, so it runs on a thread of its own, at most one at a time, every
//! `state_scan_interval`; the processing thread only starts it and collects
//! it. It reads committed records and changes nothing, so it never affects
//! output.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use apportion_store::Store;

use crate::metrics::Metrics;
use crate::pipeline::now_ms;

/// Starts and collects the scans.
pub(crate) struct StateScan {
    store: Store,
    every: Option<Duration>,
    next: Instant,
    running: Option<JoinHandle<()>>,
    cancel: Arc<AtomicBool>,
    metrics: Metrics,
}

impl StateScan {
    /// A scan of `store` every `every` (`None`: never); the first one
    /// starts at once.
    pub(crate) fn new(store: Store, every: Option<Duration>, metrics: Metrics) -> Self {
        StateScan { store, every, next: Instant::now(), running: None, cancel: Arc::default(), metrics }
    }

    /// Collects a finished scan and starts the next one when it is due.
    pub(crate) fn tick(&mut self) {
        let Some(every) = self.every else { return };
        if self.running.as_ref().is_some_and(|h| h.is_finished()) {
            let _ = self.running.take().map(JoinHandle::join);
        }
        if self.running.is_some() || Instant::now() < self.next {
            return;
        }
        self.next = Instant::now() + every;
        let (store, cancel, metrics) = (self.store.clone(), self.cancel.clone(), self.metrics.clone());
        let spawned = std::thread::Builder::new().name("apportion-state-scan".into()).spawn(move || {
            let started = Instant::now();
            match store.oldest_journey_event(&cancel) {
                Ok(oldest) if !cancel.load(Ordering::Relaxed) => {
                    let age_s = oldest.map_or(0, |(t, _)| now_ms().saturating_sub(t).max(0) / 1000);
                    metrics.state_oldest_age.set(age_s);
                    tracing::debug!(
                        journeys = oldest.map_or(0, |(_, n)| n),
                        oldest_age_s = age_s,
                        took_ms = started.elapsed().as_millis() as u64,
                        "state scan done"
                    );
                }
                Ok(_) => {}
                Err(e) => {
                    tracing::warn!(error = %e, "the state scan failed; the next one runs after state_scan_interval")
                }
            }
        });
        match spawned {
            Ok(h) => self.running = Some(h),
            Err(e) => tracing::warn!(error = %e, "cannot start the state scan thread"),
        }
    }
}

impl Drop for StateScan {
    /// Stops a running scan and waits for it, so that no store handle
    /// outlives the pipeline.
    fn drop(&mut self) {
        self.cancel.store(true, Ordering::Relaxed);
        if let Some(h) = self.running.take() {
            let _ = h.join();
        }
    }
}
