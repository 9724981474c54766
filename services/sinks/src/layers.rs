//! Failure policies as layers around a [`Sink`] (see the crate docs).

use std::sync::Arc;
use std::time::{Duration, Instant};

use crate::spool::Spool;
use crate::{Observer, OutputBatch, Sink, SinkError};

/// Exponential backoff: `initial`, doubling after each failure, at most `max`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Backoff {
    /// First wait.
    pub initial: Duration,
    /// Longest wait.
    pub max: Duration,
}

impl Backoff {
    /// The wait before retry number `n` (0-based).
    pub fn delay(&self, n: u32) -> Duration {
        let factor = 1u32.checked_shl(n.min(31)).unwrap_or(u32::MAX);
        self.initial.saturating_mul(factor).min(self.max)
    }
}

/// Retries a retryable failure up to `max_retries` times, resetting the
/// sink and waiting with [`Backoff`] in between; then returns a retryable
/// error saying how many attempts were made. A permanent failure returns at
/// once (after a reset, so the next call starts on a fresh session).
pub struct Retry<S> {
    inner: S,
    max_retries: u32,
    backoff: Backoff,
    observer: Arc<dyn Observer>,
}

impl<S: Sink> Retry<S> {
    /// Wraps `inner`.
    pub fn new(inner: S, max_retries: u32, backoff: Backoff, observer: Arc<dyn Observer>) -> Self {
        Retry { inner, max_retries, backoff, observer }
    }

    /// The wrapped sink.
    pub fn get_ref(&self) -> &S {
        &self.inner
    }
}

impl<S: Sink> Sink for Retry<S> {
    fn name(&self) -> &'static str {
        self.inner.name()
    }

    fn write(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        let mut attempt = 0u32;
        loop {
            match self.inner.write(batch) {
                Ok(()) => return Ok(()),
                Err(e) => {
                    self.inner.reset();
                    self.observer.failed(self.inner.name());
                    if !e.retryable {
                        return Err(e);
                    }
                    if attempt >= self.max_retries || self.observer.cancelled() {
                        let tries = attempt + 1;
                        return Err(SinkError::retry(e.sink, format!("{} (gave up after {tries} attempts)", e.detail)));
                    }
                    // Sleep in slices, so that a shutdown is not held up.
                    let until = Instant::now() + self.backoff.delay(attempt);
                    while Instant::now() < until {
                        if self.observer.cancelled() {
                            return Err(SinkError::retry(e.sink, format!("{} (shutdown while retrying)", e.detail)));
                        }
                        std::thread::sleep(
                            Duration::from_millis(20).min(until.saturating_duration_since(Instant::now())),
                        );
                    }
                    self.observer.retried(self.inner.name());
                    attempt += 1;
                }
            }
        }
    }

    fn close(&mut self) -> Result<(), SinkError> {
        self.inner.close()
    }

    fn keeps_dead_letters(&self) -> bool {
        self.inner.keeps_dead_letters()
    }

    fn reset(&mut self) {
        self.inner.reset()
    }
}

/// Keeps going while the sink is unavailable: a batch the sink cannot take
/// (a retryable failure) goes to a durable [`Spool`] and the write answers
/// Ok, so the service commits and the other sinks go on. Later writes first
/// deliver spooled batches (oldest first, at most `per_write` of them, so
/// the batch that finds the sink back is not held up by a long backlog),
/// then their own. While the sink is known to be down, writes go straight
/// to the spool until the backoff has passed. Permanent failures are
/// returned as they are.
///
/// A batch may reach the sink twice (spooled, then delivered again after a
/// crash before its file was removed): the sink must deduplicate (the
/// PostgreSQL sink does, on `credit_id` / `path_id`). Dead letters are not
/// spooled (sinks wrapped here do not keep them).
pub struct Spooled<S> {
    inner: S,
    spool: Spool,
    /// False: only deliver what is already spooled, and return failures
    /// (a sink configured to pause that finds a spool of an earlier run).
    spool_new: bool,
    backoff: Backoff,
    failures: u32,
    retry_at: Option<Instant>,
    per_write: usize,
    observer: Arc<dyn Observer>,
}

impl<S: Sink> Spooled<S> {
    /// Wraps `inner` with `spool`.
    pub fn new(inner: S, spool: Spool, backoff: Backoff, per_write: usize, observer: Arc<dyn Observer>) -> Self {
        let waiting = spool.files().map(|f| f.len()).unwrap_or(0);
        if waiting > 0 {
            tracing::info!(sink = inner.name(), batches = waiting, spool = %spool.dir().display(), "spooled batches are delivered with the next batches");
        }
        Spooled {
            inner,
            spool,
            spool_new: true,
            backoff,
            failures: 0,
            retry_at: None,
            per_write: per_write.max(1),
            observer,
        }
    }

    /// Like [`Spooled::new`], but new batches are never spooled: failures
    /// are returned (the caller pauses), while batches an earlier run
    /// spooled are still delivered first.
    pub fn draining(inner: S, spool: Spool, per_write: usize, observer: Arc<dyn Observer>) -> Self {
        let backoff = Backoff { initial: Duration::ZERO, max: Duration::ZERO };
        Spooled { spool_new: false, ..Spooled::new(inner, spool, backoff, per_write, observer) }
    }

    /// Batches waiting in the spool.
    pub fn waiting(&self) -> usize {
        self.spool.files().map(|f| f.len()).unwrap_or(0)
    }

    fn deliver(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        let pending = self.spool.files().map_err(|e| SinkError::retry(self.inner.name(), format!("spool: {e}")))?;
        let total = pending.len();
        for (i, f) in pending.into_iter().take(self.per_write).enumerate() {
            self.observer.retried(self.inner.name());
            let spooled = self.spool.read(&f)?;
            self.inner.write(&spooled)?;
            self.spool.remove(&f)?;
            if i + 1 == total {
                tracing::info!(sink = self.inner.name(), batches = total, "spool delivered");
            }
        }
        if batch.has_rows() {
            self.inner.write(batch)?;
        }
        Ok(())
    }
}

impl<S: Sink> Sink for Spooled<S> {
    fn name(&self) -> &'static str {
        self.inner.name()
    }

    fn write(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        if !self.spool_new {
            return self.deliver(batch);
        }
        if self.retry_at.is_some_and(|t| Instant::now() < t) {
            if batch.has_rows() {
                self.spool.push(batch)?;
            }
            return Ok(());
        }
        match self.deliver(batch) {
            Ok(()) => {
                if self.retry_at.take().is_some() {
                    tracing::info!(sink = self.inner.name(), "sink takes batches again");
                }
                self.failures = 0;
                Ok(())
            }
            Err(e) if !e.retryable => Err(e),
            Err(e) => {
                self.inner.reset();
                self.observer.failed(self.inner.name());
                if batch.has_rows() {
                    self.spool.push(batch)?;
                }
                let wait = self.backoff.delay(self.failures);
                self.failures = self.failures.saturating_add(1);
                tracing::warn!(
                    sink = self.inner.name(),
                    error = %e,
                    retry_in_ms = wait.as_millis() as u64,
                    "sink unavailable; batch spooled for it, the other sinks continue"
                );
                self.retry_at = Some(Instant::now() + wait);
                Ok(())
            }
        }
    }

    fn close(&mut self) -> Result<(), SinkError> {
        let waiting = self.waiting();
        if waiting > 0 {
            tracing::warn!(
                sink = self.inner.name(),
                batches = waiting,
                spool = %self.spool.dir().display(),
                "batches remain spooled; they are delivered after the next start, once the sink answers"
            );
        }
        self.inner.close()
    }

    fn keeps_dead_letters(&self) -> bool {
        false
    }

    fn reset(&mut self) {
        self.inner.reset()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::NoObserver;
    use std::sync::atomic::{AtomicUsize, Ordering};

    /// A sink that fails the first `fail` attempts (retryable or not) and
    /// records what it took.
    struct Flaky {
        fail: usize,
        permanent: bool,
        attempts: usize,
        resets: usize,
        taken: Vec<usize>,
    }

    impl Sink for Flaky {
        fn name(&self) -> &'static str {
            "flaky"
        }
        fn write(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
            self.attempts += 1;
            if self.attempts <= self.fail {
                return Err(if self.permanent {
                    SinkError::fatal("flaky", "no")
                } else {
                    SinkError::retry("flaky", "down")
                });
            }
            self.taken.push(batch.paths.len());
            Ok(())
        }
        fn close(&mut self) -> Result<(), SinkError> {
            Ok(())
        }
        fn reset(&mut self) {
            self.resets += 1;
        }
    }

    fn flaky(fail: usize, permanent: bool) -> Flaky {
        Flaky { fail, permanent, attempts: 0, resets: 0, taken: Vec::new() }
    }

    fn batch(paths: usize) -> OutputBatch {
        use apportion_contract::{PathRow, Timestamp, UserKey};
        let row = PathRow {
            path_id: "n:x".into(),
            user_key: UserKey([1; 32]),
            converted: false,
            conversion_id: None,
            goal: None,
            channels: vec!["email".into()],
            touch_count: 1,
            first_touch_timestamp: Timestamp(0),
            last_touch_timestamp: Timestamp(0),
        };
        OutputBatch { paths: vec![row; paths], ..Default::default() }
    }

    const QUICK: Backoff = Backoff { initial: Duration::from_millis(1), max: Duration::from_millis(2) };

    #[derive(Default)]
    struct Counting(AtomicUsize, AtomicUsize);
    impl Observer for Counting {
        fn failed(&self, _: &'static str) {
            self.0.fetch_add(1, Ordering::SeqCst);
        }
        fn retried(&self, _: &'static str) {
            self.1.fetch_add(1, Ordering::SeqCst);
        }
    }

    #[test]
    fn backoff_doubles_up_to_its_limit() {
        let b = Backoff { initial: Duration::from_millis(100), max: Duration::from_secs(1) };
        let got: Vec<u128> = (0..6).map(|n| b.delay(n).as_millis()).collect();
        assert_eq!(got, [100, 200, 400, 800, 1000, 1000]);
        assert_eq!(b.delay(40), Duration::from_secs(1));
    }

    #[test]
    fn retry_recovers_within_its_budget_and_gives_up_after_it() {
        let seen = Arc::new(Counting::default());
        let mut r = Retry::new(flaky(2, false), 2, QUICK, seen.clone());
        r.write(&batch(1)).unwrap();
        assert_eq!((r.get_ref().attempts, r.get_ref().resets), (3, 2));
        assert_eq!((seen.0.load(Ordering::SeqCst), seen.1.load(Ordering::SeqCst)), (2, 2));

        let mut r = Retry::new(flaky(10, false), 2, QUICK, Arc::new(NoObserver));
        let e = r.write(&batch(1)).unwrap_err();
        assert!(e.retryable && e.detail.contains("gave up after 3 attempts"), "{e}");

        let mut r = Retry::new(flaky(10, true), 5, QUICK, Arc::new(NoObserver));
        let e = r.write(&batch(1)).unwrap_err();
        assert!(!e.retryable);
        assert_eq!((r.get_ref().attempts, r.get_ref().resets), (1, 1), "permanent errors are not retried");
    }

    #[test]
    fn spooled_keeps_batches_while_down_and_delivers_them_in_order() {
        let dir = tempfile::tempdir().unwrap();
        let spool = Spool::open(dir.path().join("spool"), "flaky").unwrap();
        let mut s = Spooled::new(flaky(1, false), spool, QUICK, 64, Arc::new(NoObserver));
        s.write(&batch(1)).unwrap(); // fails: spooled
        assert_eq!(s.waiting(), 1);
        std::thread::sleep(Duration::from_millis(5));
        s.write(&batch(2)).unwrap(); // the spool first, then this batch
        assert_eq!(s.waiting(), 0);
        assert_eq!(s.inner.taken, vec![1, 2]);
        // A batch with no rows (dead letters only) is not spooled.
        assert!(!s.keeps_dead_letters());
    }

    #[test]
    fn draining_delivers_an_old_spool_but_spools_nothing_new() {
        let dir = tempfile::tempdir().unwrap();
        let mut spool = Spool::open(dir.path().join("spool"), "flaky").unwrap();
        spool.push(&batch(3)).unwrap();
        let mut s = Spooled::draining(flaky(1, false), spool, 64, Arc::new(NoObserver));
        assert!(s.write(&batch(1)).unwrap_err().retryable, "a failure is returned, not spooled");
        assert_eq!(s.waiting(), 1);
        s.write(&batch(2)).unwrap();
        assert_eq!(s.waiting(), 0);
        assert_eq!(s.inner.taken, vec![3, 2]);
    }

    #[test]
    fn spooled_returns_permanent_errors() {
        let dir = tempfile::tempdir().unwrap();
        let spool = Spool::open(dir.path().join("spool"), "flaky").unwrap();
        let mut s = Spooled::new(flaky(1, true), spool, QUICK, 64, Arc::new(NoObserver));
        assert!(!s.write(&batch(1)).unwrap_err().retryable);
        assert_eq!(s.waiting(), 0);
    }
}
