//! Starting and stopping `serve`: logging, store, metrics, HTTP listeners,
//! sinks, the processing thread, signals and the shutdown grace period.
//!
//! ## Warehouse sinks
//!
//! The Parquet and PostgreSQL sinks (`[parquet]`, `[postgres]`) are written
//! after the primary output (Kafka topics or NDJSON files), for every batch,
//! before the batch commits. The PostgreSQL sink is wrapped in
//! [`PostgresOutput`], which adds what the service needs around
//! `apportion_sinks::postgres::PostgresSink`:
//!
//! - A server that cannot be reached at start is not fatal (the service
//!   starts, and connects at the first batch); a bad URL or a refused login
//!   is.
//! - `on_unavailable = "pause"`: a retryable error goes back to
//!   `write_sinks`, which retries the same batch with backoff; nothing
//!   commits meanwhile (backpressure).
//! - `on_unavailable = "continue"`: a batch PostgreSQL could not take goes to
//!   a [`Spool`] (NDJSON files, fsynced before `write()` returns, so the
//!   batch may commit), and the sink answers Ok so the other sinks and the
//!   input go on. Spooled batches are replayed, oldest first, before the
//!   batch of a later `write()`, once the retry time has come; the
//!   server deduplicates on `credit_id` / `path_id`, so a batch replayed
//!   twice (a crash between its commit and the file's removal) adds nothing.
//!   `apportion_sink_rows_total{sink="postgres"}` counts a spooled row when
//!   it is spooled (acknowledged by the sink), not again at its replay.

use std::io::{IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{bail, Context, Result};
use apportion_engine::{CreditRow, PathRow, Pseudonymizer};
use apportion_sinks::parquet::ParquetSink;
use apportion_sinks::postgres::{PostgresOptions, PostgresSink};
use apportion_sinks::{OutputBatch, Sink, SinkError};
use apportion_store::Store;
use serde::{Deserialize, Serialize};

use crate::config::{Config, LogFormat, OnUnavailable, PostgresConfig};
use crate::metrics::Metrics;
use crate::serve::pipeline::Pipeline;
use crate::serve::{run_loop, Shared, Source};

/// Sets up tracing: text on a terminal, JSON otherwise (or as configured).
pub fn init_logging(cfg: &Config) {
    let filter = tracing_subscriber::EnvFilter::try_new(&cfg.log.level)
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info"));
    let json = match cfg.log.format {
        LogFormat::Json => true,
        LogFormat::Text => false,
        LogFormat::Auto => !std::io::stderr().is_terminal(),
    };
    let b = tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr);
    let _ = if json { b.json().try_init() } else { b.try_init() };
}

/// Runs the service until SIGTERM/SIGINT. Returns an error when processing
/// stopped on its own (e.g. a permanent sink error) or did not finish within
/// the grace period.
pub fn serve(cfg: Config) -> Result<()> {
    init_logging(&cfg);
    let (key, dev) = cfg.pseudonym_key();
    if dev {
        bail!("serve needs a pseudonymization key: set APPORTION_PSEUDONYM_KEY (or pseudonym_key in the config file)");
    }
    let data_dir = cfg.data_dir().unwrap_or_else(|| PathBuf::from("apportion-data"));
    let store = Store::open(&data_dir)?;
    let metrics = Metrics::new(prometheus::Registry::new());
    let shared = Arc::new(Mutex::new(Shared::default()));
    let stop = Arc::new(AtomicBool::new(false));
    let mut pipeline = Pipeline::new(cfg.clone(), Pseudonymizer::new(&key), store, metrics.clone())?;

    let rt = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build()?;
    let admin = rt
        .block_on(tokio::net::TcpListener::bind(&cfg.admin.listen))
        .with_context(|| format!("cannot listen on admin address {}", cfg.admin.listen))?;
    let admin_addr = admin.local_addr()?;

    let (source, mut sinks, ingest): (Box<dyn Source>, Vec<Box<dyn Sink>>, Option<_>) = match &cfg.kafka {
        Some(_) => {
            let source = crate::serve::kafka::KafkaSource::new(&cfg, &metrics)?;
            let sink = crate::serve::kafka::KafkaSink::new(&cfg)?;
            metrics.register_sink("kafka");
            (Box::new(source), vec![Box::new(sink) as Box<dyn Sink>], None)
        }
        None => {
            let (tx, rx) = std::sync::mpsc::sync_channel(64);
            let watch = (!cfg.embedded.watch_file.is_empty()).then(|| PathBuf::from(&cfg.embedded.watch_file));
            let source = crate::serve::embedded::EmbeddedSource::new(&mut pipeline, rx, watch)?;
            let sink = apportion_sinks::ndjson::NdjsonSink::open(
                std::path::Path::new(&cfg.embedded.output_dir),
                cfg.embedded.rotate_bytes,
            )?;
            metrics.register_sink("file");
            let ingest = if cfg.embedded.http_listen.is_empty() {
                None
            } else {
                let l = rt
                    .block_on(tokio::net::TcpListener::bind(&cfg.embedded.http_listen))
                    .with_context(|| format!("cannot listen on ingest address {}", cfg.embedded.http_listen))?;
                Some((l, tx))
            };
            (Box::new(source), vec![Box::new(sink) as Box<dyn Sink>], ingest)
        }
    };
    sinks.extend(warehouse_sinks(&cfg, &data_dir, &metrics)?);

    let shutdown = Arc::new(tokio::sync::Notify::new());
    {
        let router = crate::admin::admin_router(metrics.clone(), shared.clone());
        let n = shutdown.clone();
        rt.spawn(async move {
            let _ = axum::serve(admin, router).with_graceful_shutdown(async move { n.notified().await }).await;
        });
    }
    if let Some((l, tx)) = ingest {
        let addr = l.local_addr()?;
        let router = crate::admin::ingest_router(tx, 256 << 20);
        let n = shutdown.clone();
        rt.spawn(async move {
            let _ = axum::serve(l, router).with_graceful_shutdown(async move { n.notified().await }).await;
        });
        tracing::info!(%addr, "ingest endpoint listening (POST /v1/events)");
    }
    tracing::info!(%admin_addr, data_dir = %data_dir.display(), models = ?cfg.models, "apportion serve started");

    let (done_tx, done_rx) = tokio::sync::oneshot::channel();
    {
        let stop = stop.clone();
        let metrics = metrics.clone();
        let shared = shared.clone();
        std::thread::Builder::new().name("apportion-processing".into()).spawn(move || {
            let r = run_loop(pipeline, source, sinks, stop, metrics, shared);
            let _ = done_tx.send(r);
        })?;
    }

    let grace = Duration::from_millis(cfg.shutdown_grace.ms().max(0) as u64);
    let result = rt.block_on(async move {
        let mut term = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())?;
        let mut done_rx = done_rx;
        tokio::select! {
            _ = tokio::signal::ctrl_c() => tracing::info!("SIGINT received; finishing the current batch"),
            _ = term.recv() => tracing::info!("SIGTERM received; finishing the current batch"),
            r = &mut done_rx => {
                shutdown.notify_waiters();
                return match r {
                    Ok(Ok(())) => Ok(()),
                    Ok(Err(e)) => Err(e.context("processing stopped")),
                    Err(_) => Err(anyhow::anyhow!("processing thread ended unexpectedly")),
                };
            }
        }
        stop.store(true, Ordering::SeqCst);
        let r = match tokio::time::timeout(grace, done_rx).await {
            Ok(Ok(r)) => r,
            Ok(Err(_)) => Err(anyhow::anyhow!("processing thread ended unexpectedly")),
            Err(_) => Err(anyhow::anyhow!(
                "shutdown grace period of {} ms passed before the batch finished; state is consistent up to the last commit",
                grace.as_millis()
            )),
        };
        shutdown.notify_waiters();
        r
    });
    rt.shutdown_timeout(Duration::from_secs(2));
    result
}

/// Directory of the PostgreSQL spool under the data directory (default).
pub const POSTGRES_SPOOL_DIR: &str = "postgres-spool";
/// Spooled batches replayed by one `write()`, so that the batch that finds
/// PostgreSQL back after a long outage is not held up by the whole backlog.
const SPOOL_REPLAY_PER_WRITE: usize = 64;
/// Longest wait between attempts to reach PostgreSQL in `continue` mode.
const MAX_CONTINUE_BACKOFF: Duration = Duration::from_secs(30);

fn span_duration(s: apportion_engine::Span) -> Duration {
    Duration::from_millis(s.ms().max(0) as u64)
}

/// The Parquet and PostgreSQL sinks configured, in that order (they follow
/// the primary sink).
pub fn warehouse_sinks(cfg: &Config, data_dir: &Path, metrics: &crate::metrics::Metrics) -> Result<Vec<Box<dyn Sink>>> {
    let mut sinks: Vec<Box<dyn Sink>> = Vec::new();
    if let Some(p) = &cfg.parquet {
        let sink = ParquetSink::open(Path::new(&p.dir), p.roll_bytes, span_duration(p.roll_after))
            .with_context(|| format!("cannot open the Parquet sink in {}", p.dir))?;
        metrics.register_sink("parquet");
        tracing::info!(dir = %p.dir, "Parquet sink open");
        sinks.push(Box::new(sink));
    }
    let default_spool = data_dir.join(POSTGRES_SPOOL_DIR);
    match &cfg.postgres {
        Some(p) => {
            let spool = if p.spool_dir.is_empty() { default_spool } else { PathBuf::from(&p.spool_dir) };
            let sink = PostgresOutput::open(p, spool, metrics.clone())?;
            metrics.register_sink("postgres");
            sinks.push(Box::new(sink));
        }
        None => {
            if let Ok(files) = Spool::open(default_spool.clone()).and_then(|s| s.files()) {
                if !files.is_empty() {
                    tracing::warn!(
                        batches = files.len(),
                        spool = %default_spool.display(),
                        "spooled batches for PostgreSQL wait here, but [postgres] is not configured: they are not replayed"
                    );
                }
            }
        }
    }
    Ok(sinks)
}

/// The PostgreSQL sink as the service runs it: connects lazily, and pauses
/// or spools while the server is unavailable (see the module docs).
pub struct PostgresOutput {
    url: String,
    opts: PostgresOptions,
    sink: Option<PostgresSink>,
    policy: OnUnavailable,
    spool: Spool,
    metrics: crate::metrics::Metrics,
    retry_at: Option<Instant>,
    backoff: Duration,
}

const PG: &str = "postgres";

impl PostgresOutput {
    /// Opens the spool and tries to connect once (creating the tables when
    /// configured). Unreachable: a warning, the first write connects. A bad
    /// URL or a refused login: an error.
    pub fn open(cfg: &PostgresConfig, spool_dir: PathBuf, metrics: crate::metrics::Metrics) -> Result<Self> {
        let opts = PostgresOptions {
            schema: cfg.schema.clone(),
            create_tables: cfg.create_tables,
            max_retries: cfg.max_retries,
            initial_backoff: span_duration(cfg.initial_backoff),
            ..PostgresOptions::default()
        };
        let spool = Spool::open(spool_dir.clone())
            .with_context(|| format!("cannot open the PostgreSQL spool {}", spool_dir.display()))?;
        let mut out = PostgresOutput {
            url: cfg.url.clone(),
            backoff: opts.initial_backoff,
            opts,
            sink: None,
            policy: cfg.on_unavailable,
            spool,
            metrics,
            retry_at: None,
        };
        // One attempt, so that an unreachable server delays the start by one
        // connect timeout at most; the session is kept only when it has the
        // configured retries (it reconnects with them at the first batch otherwise).
        let first = PostgresOptions { max_retries: 0, ..out.opts.clone() };
        match PostgresSink::connect(&out.url, first) {
            Ok(mut s) => {
                tracing::info!(target = s.target(), schema = %cfg.schema, on_unavailable = ?cfg.on_unavailable, "PostgreSQL sink connected");
                if out.opts.max_retries == 0 {
                    out.sink = Some(s);
                } else {
                    let _ = s.close();
                }
            }
            Err(e) if e.retryable => tracing::warn!(
                error = %e,
                on_unavailable = ?cfg.on_unavailable,
                "PostgreSQL is not reachable at start; batches wait for it (pause) or are spooled (continue)"
            ),
            Err(e) => return Err(anyhow::Error::new(e).context("cannot start the PostgreSQL sink")),
        }
        let waiting = out.spool.files()?.len();
        if waiting > 0 {
            tracing::info!(batches = waiting, spool = %spool_dir.display(), "spooled batches are replayed to PostgreSQL with the next batches");
        }
        Ok(out)
    }

    fn connected(&mut self) -> Result<&mut PostgresSink, SinkError> {
        if self.sink.is_none() {
            self.sink = Some(PostgresSink::connect(&self.url, self.opts.clone())?);
        }
        Ok(self.sink.as_mut().expect("connected above"))
    }

    /// Replays spooled batches (oldest first, a bounded number), then writes `batch`.
    fn deliver(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        let pending = self.spool.files().map_err(|e| SinkError::retry(PG, format!("spool: {e}")))?;
        let total = pending.len();
        for (i, f) in pending.into_iter().take(SPOOL_REPLAY_PER_WRITE).enumerate() {
            self.metrics.sink_retries.with_label_values(&[PG]).inc();
            let spooled = Spool::read(&f)?;
            self.connected()?.write(&spooled)?;
            Spool::remove(&f)?;
            if i + 1 == total {
                tracing::info!(batches = total, "PostgreSQL spool replayed");
            }
        }
        if !batch.credit.is_empty() || !batch.paths.is_empty() {
            self.connected()?.write(batch)?;
        }
        Ok(())
    }
}

impl Sink for PostgresOutput {
    fn name(&self) -> &'static str {
        PG
    }

    fn write(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        let has_rows = !batch.credit.is_empty() || !batch.paths.is_empty();
        if self.policy == OnUnavailable::Continue && self.retry_at.is_some_and(|t| Instant::now() < t) {
            if has_rows {
                self.spool.push(batch)?;
            }
            return Ok(());
        }
        match self.deliver(batch) {
            Ok(()) => {
                if self.retry_at.take().is_some() {
                    tracing::info!("PostgreSQL takes batches again");
                }
                self.backoff = self.opts.initial_backoff;
                Ok(())
            }
            Err(e) if !e.retryable || self.policy == OnUnavailable::Pause => Err(e),
            Err(e) => {
                // continue: keep the batch for later and let the others go on.
                self.metrics.sink_errors.with_label_values(&[PG]).inc();
                if has_rows {
                    self.spool.push(batch)?;
                }
                tracing::warn!(
                    error = %e,
                    retry_in_ms = self.backoff.as_millis() as u64,
                    "PostgreSQL unavailable; batch spooled for it, the other sinks continue"
                );
                self.retry_at = Some(Instant::now() + self.backoff);
                self.backoff = (self.backoff * 2).min(MAX_CONTINUE_BACKOFF);
                Ok(())
            }
        }
    }

    fn close(&mut self) -> Result<(), SinkError> {
        if let Some(mut s) = self.sink.take() {
            // Every batch is already committed at the server (or spooled):
            // a failed goodbye loses nothing.
            if let Err(e) = s.close() {
                tracing::warn!(error = %e, "closing the PostgreSQL connection failed");
            }
        }
        if let Ok(files) = self.spool.files() {
            if !files.is_empty() {
                tracing::warn!(
                    batches = files.len(),
                    spool = %self.spool.dir.display(),
                    "batches for PostgreSQL remain spooled; they are replayed after the next start, once PostgreSQL answers"
                );
            }
        }
        Ok(())
    }
}

/// Batches for PostgreSQL kept on disk while it is unavailable: one NDJSON
/// file per batch, `batch-<n>.ndjson`, numbered in order. The first line is
/// `{"apportion_spool":1}` (format version); then one line per row,
/// `{"credit":{...}}` or `{"path":{...}}`. A credit row's two floats are
/// repeated as IEEE 754 bits (`credit_bits`, `value_bits`), because JSON
/// text read back by serde_json may differ in the last bit. Files are
/// written as `.batch-<n>.ndjson.tmp`, fsynced, renamed and the directory
/// fsynced; leftover `.tmp` files belong to writes that never returned (their
/// batch did not commit and is re-delivered) and are deleted on open.
pub struct Spool {
    dir: PathBuf,
    next: u64,
}

/// Format version of spool files.
const SPOOL_VERSION: u32 = 1;

#[derive(Serialize, Deserialize)]
struct SpoolHeader {
    apportion_spool: u32,
}

#[derive(Serialize)]
#[serde(rename_all = "snake_case")]
enum SpoolLineOut<'a> {
    Credit { row: &'a CreditRow, credit_bits: u64, value_bits: Option<u64> },
    Path { row: &'a PathRow },
}

#[derive(Deserialize)]
#[serde(rename_all = "snake_case", deny_unknown_fields)]
enum SpoolLineIn {
    Credit { row: CreditRow, credit_bits: u64, value_bits: Option<u64> },
    Path { row: PathRow },
}

fn spool_name(n: u64) -> String {
    format!("batch-{n:012}.ndjson")
}

fn parse_spool_name(name: &str) -> Option<u64> {
    name.strip_prefix("batch-")?.strip_suffix(".ndjson")?.parse().ok()
}

impl Spool {
    /// Opens the spool in `dir` (created at the first batch).
    pub fn open(dir: PathBuf) -> std::io::Result<Spool> {
        let mut next = 1;
        if dir.is_dir() {
            for e in std::fs::read_dir(&dir)? {
                let name = e?.file_name().to_string_lossy().into_owned();
                if name.starts_with(".batch-") && name.ends_with(".tmp") {
                    std::fs::remove_file(dir.join(&name))?;
                } else if let Some(n) = parse_spool_name(&name) {
                    next = next.max(n + 1);
                }
            }
        }
        Ok(Spool { dir, next })
    }

    /// Spooled batch files, oldest first.
    pub fn files(&self) -> std::io::Result<Vec<PathBuf>> {
        if !self.dir.is_dir() {
            return Ok(Vec::new());
        }
        let mut files: Vec<(u64, PathBuf)> = Vec::new();
        for e in std::fs::read_dir(&self.dir)? {
            let e = e?;
            if let Some(n) = parse_spool_name(&e.file_name().to_string_lossy()) {
                files.push((n, e.path()));
            }
        }
        files.sort();
        Ok(files.into_iter().map(|(_, p)| p).collect())
    }

    /// Writes `batch`'s credit and path rows as the next spool file; durable on return.
    pub fn push(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        let err = |e: std::io::Error| SinkError::retry(PG, format!("cannot write the spool: {e}"));
        std::fs::create_dir_all(&self.dir).map_err(err)?;
        let name = spool_name(self.next);
        let tmp = self.dir.join(format!(".{name}.tmp"));
        let mut w = std::io::BufWriter::new(std::fs::File::create(&tmp).map_err(err)?);
        fn line<T: Serialize>(w: &mut impl Write, v: &T) -> std::io::Result<()> {
            serde_json::to_writer(&mut *w, v).map_err(std::io::Error::other)?;
            w.write_all(b"\n")
        }
        line(&mut w, &SpoolHeader { apportion_spool: SPOOL_VERSION }).map_err(err)?;
        for r in &batch.credit {
            let l = SpoolLineOut::Credit { row: r, credit_bits: r.credit.to_bits(), value_bits: r.credited_value.map(f64::to_bits) };
            line(&mut w, &l).map_err(err)?;
        }
        for r in &batch.paths {
            line(&mut w, &SpoolLineOut::Path { row: r }).map_err(err)?;
        }
        let f = w.into_inner().map_err(|e| err(e.into_error()))?;
        f.sync_all().map_err(err)?;
        drop(f);
        std::fs::rename(&tmp, self.dir.join(&name)).map_err(err)?;
        std::fs::File::open(&self.dir).and_then(|d| d.sync_all()).map_err(err)?;
        self.next += 1;
        Ok(())
    }

    /// Reads one spool file back. A file that cannot be parsed is a
    /// permanent error naming it (move it away to go on).
    pub fn read(path: &Path) -> Result<OutputBatch, SinkError> {
        let text = std::fs::read_to_string(path)
            .map_err(|e| SinkError::retry(PG, format!("cannot read spool file {}: {e}", path.display())))?;
        let bad = |what: String| SinkError::fatal(PG, format!("spool file {} is damaged: {what}", path.display()));
        let mut lines = text.lines();
        let header: SpoolHeader =
            serde_json::from_str(lines.next().unwrap_or_default()).map_err(|e| bad(format!("header: {e}")))?;
        if header.apportion_spool != SPOOL_VERSION {
            return Err(bad(format!("unknown format version {}", header.apportion_spool)));
        }
        let mut batch = OutputBatch::default();
        for (i, l) in lines.enumerate() {
            match serde_json::from_str::<SpoolLineIn>(l).map_err(|e| bad(format!("line {}: {e}", i + 2)))? {
                SpoolLineIn::Credit { mut row, credit_bits, value_bits } => {
                    row.credit = f64::from_bits(credit_bits);
                    row.credited_value = value_bits.map(f64::from_bits);
                    batch.credit.push(row);
                }
                SpoolLineIn::Path { row } => batch.paths.push(row),
            }
        }
        Ok(batch)
    }

    /// Deletes a replayed spool file.
    pub fn remove(path: &Path) -> Result<(), SinkError> {
        std::fs::remove_file(path)
            .map_err(|e| SinkError::retry(PG, format!("cannot remove replayed spool file {}: {e}", path.display())))
    }
}

/// `apportion health --url`: exit 0 when the URL answers 200 (container healthcheck).
pub fn health(url: &str) -> Result<()> {
    use std::io::{Read, Write};
    let rest = url.strip_prefix("http://").context("only http:// URLs are supported")?;
    let (hostport, path) = match rest.find('/') {
        Some(i) => (&rest[..i], &rest[i..]),
        None => (rest, "/"),
    };
    let addr = std::net::ToSocketAddrs::to_socket_addrs(hostport)?.next().context("address did not resolve")?;
    let mut s = std::net::TcpStream::connect_timeout(&addr, Duration::from_secs(3))?;
    s.set_read_timeout(Some(Duration::from_secs(3)))?;
    write!(s, "GET {path} HTTP/1.0\r\nHost: {hostport}\r\n\r\n")?;
    let mut buf = String::new();
    s.read_to_string(&mut buf)?;
    let status = buf.split_whitespace().nth(1).unwrap_or("");
    if status == "200" {
        Ok(())
    } else {
        bail!("{url} answered {status:?}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn credit_row(id: &str, credit: f64, value: Option<f64>) -> CreditRow {
        CreditRow {
            credit_id: id.into(),
            conversion_id: "c1".into(),
            user_key: "ab".into(),
            model: "linear".into(),
            model_version: None,
            goal: "purchase".into(),
            touch_event_id: Some("t1".into()),
            channel: "email".into(),
            campaign: None,
            interaction: Some("click".into()),
            position: 1,
            path_length: 3,
            touch_timestamp: Some("2026-06-01T10:00:00.000Z".into()),
            conversion_timestamp: "2026-06-01T11:00:00.000Z".into(),
            credit,
            credited_value: value,
            currency: Some("EUR".into()),
        }
    }

    /// Spooled batches come back exactly (floats bit for bit), oldest
    /// first; numbering continues after a restart; an unfinished write is
    /// dropped on open.
    #[test]
    fn spool_round_trip() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("spool");
        let third = 1.0 / 3.0;
        let b1 = OutputBatch {
            credit: vec![credit_row("a", third, Some(third * 129.5)), credit_row("b", 0.1 + 0.2, None)],
            paths: vec![PathRow {
                path_id: "c:c1".into(),
                user_key: "ab".into(),
                converted: true,
                conversion_id: Some("c1".into()),
                goal: Some("purchase".into()),
                channels: vec!["email".into(), "social".into(), "email".into()],
                touch_count: 3,
                first_touch_timestamp: "2026-06-01T09:00:00.000Z".into(),
                last_touch_timestamp: "2026-06-01T10:00:00.000Z".into(),
            }],
            dead_letters: vec![],
        };
        let b2 = OutputBatch { credit: vec![credit_row("c", f64::MIN_POSITIVE, Some(0.0))], ..Default::default() };
        let mut s = Spool::open(path.clone()).unwrap();
        assert!(s.files().unwrap().is_empty());
        s.push(&b1).unwrap();
        std::fs::write(path.join(".batch-000000000099.ndjson.tmp"), "half a line").unwrap();
        let mut s = Spool::open(path.clone()).unwrap();
        assert!(!path.join(".batch-000000000099.ndjson.tmp").exists());
        s.push(&b2).unwrap();
        let files = s.files().unwrap();
        let names: Vec<_> = files.iter().map(|f| f.file_name().unwrap().to_string_lossy().into_owned()).collect();
        assert_eq!(names, ["batch-000000000001.ndjson", "batch-000000000002.ndjson"]);
        assert_eq!(Spool::read(&files[0]).unwrap(), b1);
        assert_eq!(Spool::read(&files[1]).unwrap(), b2);
        Spool::remove(&files[0]).unwrap();
        assert_eq!(s.files().unwrap(), files[1..]);
    }

    #[test]
    fn damaged_spool_file_is_a_permanent_error() {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("batch-000000000001.ndjson");
        std::fs::write(&f, "{\"apportion_spool\":2}\n").unwrap();
        let e = Spool::read(&f).unwrap_err();
        assert!(!e.retryable && e.detail.contains("format version 2"), "{e}");
        std::fs::write(&f, "{\"apportion_spool\":1}\n{\"credit\":{\"row\":{}}}\n").unwrap();
        let e = Spool::read(&f).unwrap_err();
        assert!(!e.retryable && e.detail.contains("line 2"), "{e}");
    }
}
