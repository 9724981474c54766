//! The processing loop: poll a batch from the source, apply it through the
//! [`Pipeline`], write the output to every sink (retrying with backoff; a
//! batch is never dropped), then commit state and offsets, then acknowledge
//! to the source. It runs on one thread, and the sinks write on a second,
//! which then writes the batch's commit to the store (prepared on the
//! first before the next batch is applied, see [`Pipeline::prepare_commit`])
//! and flushes it: under a backlog (a batch came back full) the next batch
//! is polled and applied meanwhile; light input is written and committed
//! before the next poll, so latency stays as low.
//! The service around it ([`crate::service`]) serves HTTP and turns
//! signals into the stop flag. Stopping finishes the batches in hand,
//! flushes the store and commits.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{bail, Result};
use apportion_sinks::{OutputBatch, Sink};

use crate::metrics::Metrics;
use crate::pipeline::{Pipeline, PreparedBatch};
use crate::source::Source;

/// State shared with the admin endpoints.
#[derive(Debug, Default)]
pub struct Shared {
    /// Ready for traffic.
    pub ready: bool,
    /// Consumer lag (messages), if known.
    pub lag: Option<u64>,
    /// The fitted models as JSON (model endpoint).
    pub models: serde_json::Value,
    /// Set when the processing loop stopped with an error.
    pub failed: Option<String>,
    /// The comparison of the models over every conversion credited since
    /// the process started (`/v1/compare`); `None` when turned off
    /// (`admin.compare = false`).
    pub compare: Option<apportion_report::Comparison>,
}

/// Adds the committed batch's conversions to the running comparison. The
/// rows of one conversion are contiguous in a batch (every model's rows of
/// a conversion are emitted together).
fn feed_comparison(shared: &Mutex<Shared>, out: &OutputBatch) {
    let mut sh = shared.lock().expect("shared state");
    let Some(cmp) = sh.compare.as_mut() else { return };
    let mut start = 0;
    while start < out.credit.len() {
        let id = &out.credit[start].conversion_id;
        let end = start + out.credit[start..].iter().take_while(|r| &r.conversion_id == id).count();
        let rows: Vec<apportion_report::CreditRecord> =
            out.credit[start..end].iter().map(apportion_report::CreditRecord::from_row).collect();
        if let Err(e) = cmp.add_conversion(&rows) {
            tracing::warn!(error = %e, "a conversion could not be added to the /v1/compare comparison");
        }
        start = end;
    }
}

/// What became of a batch's output.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Written {
    /// Every sink has it; `stalled` when some sink needed retries first.
    Done {
        /// A sink held the batch for a while (the idle clocks restart).
        stalled: bool,
    },
    /// Shutdown came while a sink held the batch: it is given up
    /// uncommitted and delivered again after the restart.
    Abandoned,
    /// Its transaction was refused: the consumer group moved on since the
    /// batch was read ([`crate::pipeline::changelog::StaleGeneration`]).
    /// Nothing of it is committed; the loop rolls back and reads again.
    Refused,
}

/// Writes `out` to every sink, retrying each with exponential backoff until
/// it succeeds, a permanent error occurs, or shutdown is requested.
///
/// Sinks are written in order (the primary output first); a sink that fails
/// is retried before the next one is tried, so a paused sink holds the
/// batch and nothing commits. On shutdown during the retries the batch is
/// given up uncommitted: sinks written before may hold its rows already,
/// and its re-delivery writes them again (at least once; rows carry
/// deterministic ids). The backoff sleep wakes up for shutdown at once; a
/// `write()` in progress is not interrupted (the PostgreSQL sink bounds one
/// attempt by its connect and statement timeouts).
pub fn write_sinks(
    sinks: &mut [Box<dyn Sink>],
    out: &OutputBatch,
    stop: &AtomicBool,
    metrics: &Metrics,
    shared: &Mutex<Shared>,
) -> Result<Written> {
    let mut stalled = false;
    for sink in sinks.iter_mut() {
        let mut backoff = Duration::from_millis(100);
        loop {
            match sink.write(out) {
                Ok(()) => {
                    let name = sink.name();
                    metrics.sink_rows.with_label_values(&[name, "credit"]).inc_by(out.credit.len() as u64);
                    metrics.sink_rows.with_label_values(&[name, "path"]).inc_by(out.paths.len() as u64);
                    if sink.keeps_dead_letters() {
                        metrics
                            .sink_rows
                            .with_label_values(&[name, "dead_letter"])
                            .inc_by(out.dead_letters.len() as u64);
                        metrics.sink_rows.with_label_values(&[name, "erasure"]).inc_by(out.erasures.len() as u64);
                    }
                    break;
                }
                Err(e) => {
                    // The next attempt starts afresh (Sink::reset).
                    sink.reset();
                    metrics.sink_errors.with_label_values(&[sink.name()]).inc();
                    if !e.retryable {
                        bail!("{e}");
                    }
                    stalled = true;
                    let shutdown = || {
                        tracing::warn!(sink = sink.name(), error = %e, "shutdown while a sink holds the batch: the batch is not committed and is delivered again after the restart (HTTP clients got no 202 and must resend)");
                        Ok(Written::Abandoned)
                    };
                    if stop.load(Ordering::SeqCst) {
                        return shutdown();
                    }
                    tracing::warn!(sink = sink.name(), error = %e, retry_in_ms = backoff.as_millis() as u64, "sink write failed; retrying the same batch");
                    metrics.sink_retries.with_label_values(&[sink.name()]).inc();
                    // Not ready while a sink holds the batch (backpressure).
                    metrics.ready.set(0);
                    shared.lock().expect("shared state").ready = false;
                    if !sleep_unless_stopped(backoff, stop, metrics) {
                        return shutdown();
                    }
                    backoff = (backoff * 2).min(MAX_BACKOFF);
                }
            }
        }
    }
    Ok(Written::Done { stalled })
}

/// The longest wait between two attempts of a failed write.
const MAX_BACKOFF: Duration = Duration::from_secs(30);

/// Sleeps `d`, waking up at once for shutdown (false then); the loop's
/// liveness gauge keeps turning meanwhile (waiting, not stuck).
fn sleep_unless_stopped(d: Duration, stop: &AtomicBool, metrics: &Metrics) -> bool {
    const SLICE: Duration = Duration::from_millis(50);
    let until = Instant::now() + d;
    while Instant::now() < until {
        if stop.load(Ordering::SeqCst) {
            return false;
        }
        metrics.loop_turn.set(crate::pipeline::now_ms() / 1000);
        std::thread::sleep(SLICE.min(until.saturating_duration_since(Instant::now())));
    }
    !stop.load(Ordering::SeqCst)
}

/// The number of events asked of the source for the next batch: it starts
/// at `batch_size`, doubles after a batch that came back full (the source
/// has a backlog: bigger batches amortize the store commit, the sinks'
/// flush and the offset commit), and halves back towards `batch_size` after
/// a batch that came back less than a quarter full (light input: small
/// batches keep latency low). Batch boundaries never change output
/// (docs/contract.md, "Determinism").
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct BatchLimit {
    min: usize,
    max: usize,
    current: usize,
}

impl BatchLimit {
    /// A limit between `min` and `max` (both at least 1), starting at `min`.
    pub fn new(min: usize, max: usize) -> Self {
        let min = min.max(1);
        BatchLimit { min, max: max.max(min), current: min }
    }

    /// The current limit.
    pub fn get(&self) -> usize {
        self.current
    }

    /// Adjusts the limit after a batch of `got` events.
    pub fn after(&mut self, got: usize) {
        if got >= self.current {
            self.current = self.current.saturating_mul(2).min(self.max);
        } else if got < self.current / 4 {
            self.current = (self.current / 2).max(self.min);
        }
    }
}

/// The sink thread's part of a batch: its output to every sink, then (once
/// they all have it) its prepared state and offsets to the store, durable.
/// The processing thread only finishes the bookkeeping.
fn write_batch(
    sinks: &mut [Box<dyn Sink>],
    out: &OutputBatch,
    prepared: &mut PreparedBatch,
    stop: &AtomicBool,
    metrics: &Metrics,
    shared: &Mutex<Shared>,
) -> Result<Written> {
    let mut backoff = Duration::from_millis(100);
    let written = loop {
        // The decisions the output depends on reach the changelog before
        // it (once: a retry after an aborted transaction has them there).
        match publish_decisions(prepared, stop, metrics) {
            Ok(true) => {}
            Ok(false) => break Ok(Written::Abandoned),
            Err(e) => break Err(e),
        }
        let written = write_sinks(sinks, out, stop, metrics, shared);
        let Ok(Written::Done { .. }) = written else { break written };
        break match write_commit(prepared, stop, metrics) {
            Ok(Committed::Yes) => written,
            Ok(Committed::No) => Ok(Written::Abandoned),
            Ok(Committed::Refused) => Ok(Written::Refused),
            Err(e) => Err(e),
            Ok(Committed::Aborted) => {
                // The transaction took the output rows with it: the batch
                // is written again, output first.
                if !sleep_unless_stopped(backoff, stop, metrics) {
                    tracing::warn!("shutdown while the batch's transaction was retried: the batch is not committed and is delivered again after the restart");
                    break Ok(Written::Abandoned);
                }
                backoff = (backoff * 2).min(MAX_BACKOFF);
                continue;
            }
        };
    };
    // Done with it either way: a revocation need not wait any longer.
    prepared.release();
    written
}

/// What became of a batch's commit.
enum Committed {
    /// Published and written.
    Yes,
    /// Shutdown came first: not committed.
    No,
    /// Its transaction was aborted, with the output sent in it.
    Aborted,
    /// Its transaction was refused for an old consumer group generation
    /// (and aborted): not to be written again as it is.
    Refused,
}

/// Writes a batch's prepared commit: published to the changelog (if any),
/// retried with backoff while the changelog cannot be reached, then
/// written to the store.
fn write_commit(prepared: &mut PreparedBatch, stop: &AtomicBool, metrics: &Metrics) -> Result<Committed> {
    let mut backoff = Duration::from_millis(100);
    loop {
        match prepared.write() {
            Ok(()) => return Ok(Committed::Yes),
            Err(e) if e.is::<crate::pipeline::changelog::StaleGeneration>() => {
                metrics.changelog_failures.inc();
                tracing::warn!(error = %format!("{e:#}"), "the batch's transaction was refused");
                return Ok(Committed::Refused);
            }
            Err(e) if e.is::<crate::pipeline::changelog::Aborted>() => {
                metrics.changelog_failures.inc();
                tracing::warn!(error = %format!("{e:#}"), "the batch's transaction did not commit; writing the batch again");
                return Ok(Committed::Aborted);
            }
            Err(e) => {
                if !wait_to_publish_again(e, "commit", &mut backoff, stop, metrics)? {
                    return Ok(Committed::No);
                }
            }
        }
    }
}

/// Publishes a batch's decisions ahead of its output
/// ([`PreparedBatch::publish_decisions`]), retried like a commit; false
/// when shutdown came first (the batch is then not written at all).
fn publish_decisions(prepared: &mut PreparedBatch, stop: &AtomicBool, metrics: &Metrics) -> Result<bool> {
    let mut backoff = Duration::from_millis(100);
    loop {
        match prepared.publish_decisions() {
            Ok(()) => return Ok(true),
            Err(e) => {
                if !wait_to_publish_again(e, "decisions", &mut backoff, stop, metrics)? {
                    return Ok(false);
                }
            }
        }
    }
}

/// After a publication to the changelog failed with `e`: the error itself
/// unless the changelog could not be reached; else waits `backoff` (then
/// doubled) and says whether to try again (false: shutdown came).
fn wait_to_publish_again(
    e: anyhow::Error,
    what: &str,
    backoff: &mut Duration,
    stop: &AtomicBool,
    metrics: &Metrics,
) -> Result<bool> {
    if !e.is::<crate::pipeline::changelog::PublishError>() {
        return Err(e);
    }
    metrics.changelog_failures.inc();
    tracing::warn!(error = %format!("{e:#}"), retry_in_ms = backoff.as_millis() as u64, "the changelog did not take the batch's {what}; retrying");
    if !sleep_unless_stopped(*backoff, stop, metrics) {
        tracing::warn!("shutdown while the changelog was unreachable: the batch is not committed and is delivered again after the restart");
        return Ok(false);
    }
    *backoff = (*backoff * 2).min(MAX_BACKOFF);
    Ok(true)
}

/// Rows per event of the last batch with input, so that the next batch's
/// output is allocated once at about its size (measured: growing it row by
/// row took about 4 % of serve's CPU in reallocations and page zeroing,
/// load/RESULTS.md section 10). Only the capacity follows: the rows are
/// the same.
#[derive(Default)]
struct OutputRates {
    events: usize,
    credit: usize,
    paths: usize,
}

impl OutputRates {
    /// An empty batch with room for the output of `events` events.
    fn batch_for(&self, events: usize) -> OutputBatch {
        if self.events == 0 || events == 0 {
            return OutputBatch::default();
        }
        // A little more than the last batch's rate, so that a batch just
        // above it does not double its vectors at the end.
        let room = |rows: usize| rows.saturating_mul(events) / self.events * 9 / 8 + 16;
        OutputBatch::with_capacity(room(self.credit), room(self.paths))
    }

    /// Takes the rates of a batch of `events` events that gave `out`.
    fn seen(&mut self, events: usize, out: &OutputBatch) {
        if events > 0 {
            *self = OutputRates { events, credit: out.credit.len(), paths: out.paths.len() };
        }
    }
}

/// What [`run_loop`]'s `finish` made of a batch in flight.
enum Finished {
    /// Committed and acknowledged.
    Committed,
    /// Shutdown came while a sink held it: the loop stops.
    Stop,
    /// Its transaction was refused: every uncommitted change is rolled back
    /// and the source hands over again from the committed offsets (a batch
    /// applied meanwhile is dropped with it).
    Rewound,
}

/// A batch whose output the sink thread is writing: what is left to do
/// once it has.
struct InFlight {
    statuses: Vec<(crate::source::PartId, Vec<crate::source::MsgStatus>)>,
    started: Instant,
    refitted: bool,
}

/// The processing loop. Returns when `stop` is set (after finishing the
/// current batch), when a finite source is exhausted (after closing every
/// journey), or on a permanent error.
pub fn run_loop(
    mut pipeline: Pipeline,
    mut source: Box<dyn Source>,
    mut sinks: Vec<Box<dyn Sink>>,
    stop: Arc<AtomicBool>,
    metrics: Metrics,
    shared: Arc<Mutex<Shared>>,
) -> Result<()> {
    let mut limit = BatchLimit::new(pipeline.config().batch_size, pipeline.config().max_batch_size);
    let mut rates = OutputRates::default();
    let max_ready_lag = pipeline.config().admin.max_ready_lag;
    let mut last_lag = Instant::now() - Duration::from_secs(60);
    publish_models(&pipeline, &shared);
    // The sinks write on a thread of their own, so that under a backlog
    // the next batch is read and applied while the sinks write this one.
    // The order per batch stays: its output at every sink, then its state
    // and offsets (prepared before the next batch is applied, written after
    // the sinks have the output), then the acknowledgement to the source.
    let sinks_ref = &mut sinks;
    let result = std::thread::scope(|scope| -> Result<()> {
        let (job_tx, job_rx) = std::sync::mpsc::sync_channel::<(OutputBatch, PreparedBatch)>(1);
        let (done_tx, done_rx) = std::sync::mpsc::sync_channel::<(PreparedBatch, Result<Written>)>(1);
        {
            let (stop, metrics, shared) = (stop.clone(), metrics.clone(), shared.clone());
            std::thread::Builder::new().name("apportion-sinks".into()).spawn_scoped(scope, move || {
                for (out, mut prepared) in job_rx {
                    let written = write_batch(sinks_ref, &out, &mut prepared, &stop, &metrics, &shared);
                    if let Ok(Written::Done { .. }) = written {
                        // Committed (output and state written): counted in the
                        // running comparison here, off the processing thread.
                        feed_comparison(&shared, &out);
                    }
                    let go_on = matches!(written, Ok(Written::Done { .. } | Written::Refused));
                    // At most one batch is in flight, so this never waits.
                    // The output is dropped here too (its memory freed off
                    // the processing thread).
                    drop(out);
                    if done_tx.send((prepared, written)).is_err() || !go_on {
                        return;
                    }
                }
            })?;
        }
        // The batch whose output the sinks are writing.
        let mut in_flight: Option<InFlight> = None;
        // Waits for the sinks to have the batch in flight, then commits it
        // and acknowledges it.
        let finish = |pipeline: &mut Pipeline, source: &mut Box<dyn Source>, f: InFlight| -> Result<Finished> {
            let (prepared, written) =
                done_rx.recv().map_err(|_| anyhow::anyhow!("the sink thread stopped without an answer"))?;
            match written {
                Ok(Written::Done { stalled }) => {
                    if stalled {
                        pipeline.restart_idle_clocks(Instant::now());
                    }
                }
                Ok(Written::Abandoned) => {
                    // Nothing of this batch is committed: it is re-delivered.
                    pipeline.rollback()?;
                    return Ok(Finished::Stop);
                }
                Ok(Written::Refused) => {
                    // Nothing of it committed, and a batch applied since
                    // builds on it: both are read again, for the partitions
                    // this instance still owns (the source's assignment is
                    // current after its next poll).
                    drop(prepared);
                    pipeline.rollback()?;
                    source.rewind(pipeline)?;
                    metrics.batches_refused.inc();
                    return Ok(Finished::Rewound);
                }
                Err(e) => {
                    pipeline.rollback()?;
                    return Err(e);
                }
            }
            pipeline.apply_commit(prepared)?;
            if f.refitted {
                publish_models(pipeline, &shared);
            }
            source.committed(pipeline, f.statuses)?;
            metrics.batch_duration.observe(f.started.elapsed().as_secs_f64());
            Ok(Finished::Committed)
        };
        let looped = (|| -> Result<()> {
            while !stop.load(Ordering::SeqCst) {
                // A loop that stops turning (a call that never returns) shows
                // here and in the ApportionProcessingStalled alert.
                metrics.loop_turn.set(crate::pipeline::now_ms() / 1000);
                let asked = limit.get();
                let batch = source.poll(&mut pipeline, asked, Duration::from_millis(200))?;
                let group = source.group();
                let started = Instant::now();
                let had_input = !batch.is_empty();
                let events: usize = batch.iter().map(|(_, m)| m.len()).sum();
                limit.after(events);
                metrics.batch_limit.set(limit.get() as i64);
                let mut out = rates.batch_for(events);
                let mut statuses = Vec::with_capacity(batch.len());
                for (id, msgs) in &batch {
                    statuses.push((id.clone(), pipeline.process(id, msgs, &mut out)?));
                }
                rates.seen(events, &out);
                let finished = !had_input && source.exhausted();
                let now = Instant::now();
                for id in pipeline.open_partitions() {
                    pipeline.set_caught_up(&id, source.caught_up(&id), now);
                }
                if finished {
                    pipeline.drain(&mut out)?;
                } else {
                    pipeline.tick(now, &mut out)?;
                }
                // The previous batch first: its state is written before this one's.
                if let Some(f) = in_flight.take() {
                    match finish(&mut pipeline, &mut source, f)? {
                        Finished::Committed => {}
                        Finished::Stop => return Ok(()),
                        // This batch was rolled back with it.
                        Finished::Rewound => continue,
                    }
                }
                if had_input || !out.is_empty() {
                    // Decisions that depended on processing time are durable
                    // before any output that depends on them is written.
                    pipeline.persist_decisions()?;
                    // A refit takes effect at this commit: the snapshot each
                    // partition credits with is committed with its offsets.
                    let refitted = pipeline.maybe_refit()?;
                    let mut prepared = pipeline.prepare_commit()?;
                    prepared.set_group(group);
                    job_tx.send((out, prepared)).map_err(|_| anyhow::anyhow!("the sink thread stopped"))?;
                    let f = InFlight { statuses, started, refitted };
                    if events >= asked && !finished {
                        // A backlog: the next batch is applied while the sinks write.
                        in_flight = Some(f);
                    } else {
                        match finish(&mut pipeline, &mut source, f)? {
                            Finished::Committed => {}
                            Finished::Stop => return Ok(()),
                            Finished::Rewound => continue,
                        }
                    }
                } else if pipeline.maybe_refit()? {
                    // Idle: the next commit adopts the new snapshot; the
                    // model endpoint shows it from now (refit rounds go on
                    // without input, so instances stay in step).
                    publish_models(&pipeline, &shared);
                }
                if finished {
                    break;
                }
                if last_lag.elapsed() >= Duration::from_secs(5) {
                    source.update_lag(&metrics);
                    pipeline.update_gauges();
                    update_disk(&pipeline, &metrics);
                    last_lag = Instant::now();
                }
                let lag = source.lag();
                let ready = source.ready() && (max_ready_lag == 0 || lag.is_none_or(|l| l <= max_ready_lag));
                metrics.ready.set(ready as i64);
                let mut s = shared.lock().expect("shared state");
                s.ready = ready;
                s.lag = lag;
            }
            // Stopping: the batch in flight is finished (or given up).
            if let Some(f) = in_flight.take() {
                finish(&mut pipeline, &mut source, f)?;
            }
            Ok(())
        })();
        drop(job_tx);
        looped
    });
    metrics.ready.set(0);
    shared.lock().expect("shared state").ready = false;
    if let Err(e) = &result {
        shared.lock().expect("shared state").failed = Some(format!("{e:#}"));
        return result;
    }
    pipeline.flush()?;
    for s in sinks.iter_mut() {
        s.close()?;
    }
    source.close(&mut pipeline)?;
    tracing::info!("processing stopped cleanly: batch finished, store flushed, offsets committed");
    Ok(())
}

fn publish_models(pipeline: &Pipeline, shared: &Arc<Mutex<Shared>>) {
    shared.lock().expect("shared state").models = pipeline.models_json();
}

fn update_disk(pipeline: &Pipeline, metrics: &Metrics) {
    if let Some(dir) = pipeline.config().data_dir() {
        if let Ok(n) = fs_available(&dir) {
            metrics.disk_available.set(n as i64);
        }
    }
}

/// Free bytes on the filesystem holding `dir`.
fn fs_available(dir: &std::path::Path) -> Result<u64> {
    Ok(fs2::available_space(dir)?)
}

#[cfg(test)]
mod tests {
    use super::BatchLimit;

    // Check values derived by hand from BatchLimit's documented rule
    // (double after a full batch, halve after one under a quarter full).
    #[test]
    fn batch_limit_grows_under_a_backlog_and_returns_when_input_is_light() {
        let mut l = BatchLimit::new(5000, 50_000);
        assert_eq!(l.get(), 5000);
        // Full batches: 5000 -> 10000 -> 20000 -> 40000 -> 50000 (capped).
        for want in [10_000, 20_000, 40_000, 50_000, 50_000] {
            l.after(l.get());
            assert_eq!(l.get(), want);
        }
        // A batch between a quarter and full keeps the limit.
        l.after(20_000);
        assert_eq!(l.get(), 50_000);
        // Light input halves it back, never below batch_size.
        for want in [25_000, 12_500, 6_250, 5000, 5000] {
            l.after(10);
            assert_eq!(l.get(), want);
        }
    }

    #[test]
    fn batch_limit_with_equal_bounds_is_fixed() {
        let mut l = BatchLimit::new(7, 7);
        l.after(7);
        assert_eq!(l.get(), 7);
        l.after(0);
        assert_eq!(l.get(), 7);
        assert_eq!(BatchLimit::new(0, 0).get(), 1);
    }
}
