//! Starting and stopping `serve`: logging, store, metrics, HTTP listeners,
//! sources and sinks, the processing thread, and the shutdown grace period.
//!
//! [`run`] takes the shutdown signal as a future (as mini-redis does), so
//! the binary passes SIGTERM/SIGINT and tests can pass anything.

use std::future::Future;
use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use anyhow::{bail, Context, Result};
use apportion_engine::Pseudonymizer;
use apportion_sinks::{Observer, Sink};

use crate::config::{Config, LogFormat};
use crate::metrics::{Metrics, SinkObserver};
use crate::pipeline::Pipeline;
use crate::run_loop::{run_loop, Shared};
use crate::source::Source;

/// Sets up tracing: text on a terminal, JSON otherwise (or as configured).
/// An invalid `log.level` is an error naming it.
pub fn init_logging(cfg: &Config) -> Result<()> {
    let filter = tracing_subscriber::EnvFilter::try_new(&cfg.log.level).with_context(|| {
        format!("log.level {:?} is not a valid filter (e.g. \"info\", \"apportion=debug\")", cfg.log.level)
    })?;
    let json = match cfg.log.format {
        LogFormat::Json => true,
        LogFormat::Text => false,
        LogFormat::Auto => !std::io::stderr().is_terminal(),
    };
    let b = tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr);
    let _ = if json { b.json().try_init() } else { b.try_init() };
    Ok(())
}

/// The Parquet and PostgreSQL sinks configured, in that order (they follow
/// the primary sink).
pub fn warehouse_sinks(
    cfg: &Config,
    data_dir: &Path,
    metrics: &Metrics,
    stop: Arc<AtomicBool>,
    deadline: Arc<Mutex<Option<std::time::Instant>>>,
) -> Result<Vec<Box<dyn Sink>>> {
    let mut sinks: Vec<Box<dyn Sink>> = Vec::new();
    if let Some(p) = &cfg.parquet {
        let sink = p.build().with_context(|| format!("cannot open the Parquet sink in {}", p.dir))?;
        metrics.register_sink("parquet");
        sinks.push(Box::new(sink));
    }
    match &cfg.postgres {
        Some(p) => {
            let observer: Arc<dyn Observer> = Arc::new(SinkObserver { metrics: metrics.clone(), stop, deadline });
            let sink = p.build(data_dir, observer).context("cannot start the PostgreSQL sink")?;
            metrics.register_sink("postgres");
            sinks.push(sink);
        }
        None => {
            let default_spool = data_dir.join(apportion_sinks::postgres::POSTGRES_SPOOL_DIR);
            if let Ok(files) =
                apportion_sinks::spool::Spool::open(default_spool.clone(), "postgres").and_then(|s| s.files())
            {
                if !files.is_empty() {
                    tracing::warn!(
                        batches = files.len(),
                        spool = %default_spool.display(),
                        "spooled batches for PostgreSQL wait here, but [postgres] is not configured: they are not delivered"
                    );
                }
            }
        }
    }
    Ok(sinks)
}

/// Runs the service until `shutdown` completes (then finishes the current
/// batch, flushes and commits within `shutdown_grace`) or processing stops
/// on its own. Returns an error when processing stopped with an error or
/// did not finish within the grace period.
pub fn run(cfg: Config, shutdown: impl Future<Output = ()> + Send + 'static) -> Result<()> {
    init_logging(&cfg)?;
    let (key, dev) = cfg.pseudonym_key();
    if dev {
        bail!("serve needs a pseudonymization key: set APPORTION_PSEUDONYM_KEY (or pseudonym_key in the config file)");
    }
    let data_dir = cfg.data_dir().unwrap_or_else(|| PathBuf::from("apportion-data"));
    let pseudo = Pseudonymizer::new(&key);
    let store = crate::state_admin::open_keyed(Some(&data_dir), &pseudo)?;
    let metrics = Metrics::new(prometheus::Registry::new());
    let shared = Arc::new(Mutex::new(Shared {
        compare: cfg.admin.compare.then(|| apportion_report::Comparison::new(Default::default())),
        ..Shared::default()
    }));
    let stop = Arc::new(AtomicBool::new(false));
    let mut pipeline = Pipeline::new(cfg.clone(), pseudo, store, metrics.clone())?;

    let rt = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build()?;
    let admin = rt
        .block_on(tokio::net::TcpListener::bind(&cfg.admin.listen))
        .with_context(|| format!("cannot listen on admin address {}", cfg.admin.listen))?;
    let admin_addr = admin.local_addr()?;

    // Exactly-once delivery: the instance's transactions.
    let instance = pipeline.store().instance_name()?;
    let txn = match &cfg.kafka {
        Some(k) if k.delivery == crate::config::Delivery::ExactlyOnce => {
            Some(Arc::new(crate::kafka::txn::Txn::new(k, &instance)?))
        }
        _ => None,
    };
    let transactional = txn.is_some();
    let (source, mut sinks, ingest): (Box<dyn Source>, Vec<Box<dyn Sink>>, Option<_>) = match &cfg.kafka {
        Some(_) => {
            let source = crate::kafka::KafkaSource::new(&cfg, &metrics, txn.clone(), &instance)?;
            if let Some((log, gate)) = source.changelog() {
                pipeline.set_changelog(log, gate);
            }
            let plan = cfg.model_plan();
            if let Some(k) = cfg.kafka.as_ref().filter(|k| k.shared_path_stats && plan.data_driven()) {
                let exchange =
                    crate::kafka::path_stats::KafkaPathStats::new(k, k.consumed_topics(), plan.markov_order)?;
                pipeline.set_stats_exchange(Box::new(exchange));
            }
            let sink = crate::kafka::KafkaSink::new(&cfg, txn)?;
            metrics.register_sink("kafka");
            (Box::new(source), vec![Box::new(sink) as Box<dyn Sink>], None)
        }
        None => {
            let (tx, rx) = std::sync::mpsc::sync_channel(cfg.embedded.queue_requests);
            let source = crate::embedded::EmbeddedSource::new(&mut pipeline, rx, cfg.watch_file())?;
            let sink = apportion_sinks::ndjson::NdjsonSink::open(
                Path::new(&cfg.embedded.output_dir),
                cfg.embedded.rotate_bytes,
            )?;
            metrics.register_sink("file");
            let ingest = if cfg.embedded.http_listen.is_empty() {
                None
            } else {
                let token = cfg.ingest_token()?;
                let l = rt
                    .block_on(tokio::net::TcpListener::bind(&cfg.embedded.http_listen))
                    .with_context(|| format!("cannot listen on ingest address {}", cfg.embedded.http_listen))?;
                let token = crate::auth::ingest_guard(token, l.local_addr()?)?;
                Some((l, tx, token))
            };
            (Box::new(source), vec![Box::new(sink) as Box<dyn Sink>], ingest)
        }
    };
    // When the shutdown grace runs out: a sink write still running then
    // gives up (a margin of a second is kept to finish and close).
    let deadline: Arc<Mutex<Option<std::time::Instant>>> = Arc::default();
    sinks.extend(warehouse_sinks(&cfg, &data_dir, &metrics, stop.clone(), deadline.clone())?);
    if transactional {
        // The Kafka sink's rows go into the batch's transaction, committed
        // by the changelog's publication: written last, right before it,
        // so that a transaction stays open only for that long.
        sinks.rotate_left(1);
    }

    let http_stop = Arc::new(tokio::sync::Notify::new());
    {
        let erase = match (&cfg.kafka, cfg.admin_token()?) {
            (Some(_), Some(token)) => Some((
                crate::kafka::erase::EraseSender::new(&cfg)?,
                Pseudonymizer::new(&key),
                crate::auth::BearerToken::new(&token),
            )),
            _ => None,
        };
        let router = crate::admin::admin_router(metrics.clone(), shared.clone());
        let router = if cfg.kafka.is_some() { router.merge(crate::admin::erase_router(erase)) } else { router };
        let n = http_stop.clone();
        rt.spawn(async move {
            let _ = axum::serve(admin, router).with_graceful_shutdown(async move { n.notified().await }).await;
        });
    }
    if let Some((l, tx, token)) = ingest {
        let addr = l.local_addr()?;
        let authenticated = token.is_some();
        let router = crate::embedded::http::count_refusals(
            crate::embedded::http::ingest_router(
                tx,
                Pseudonymizer::new(&key),
                cfg.embedded.max_body_bytes,
                cfg.embedded.queue_requests,
                token,
            ),
            metrics.clone(),
        );
        let n = http_stop.clone();
        rt.spawn(async move {
            let _ = axum::serve(l, router).with_graceful_shutdown(async move { n.notified().await }).await;
        });
        tracing::info!(%addr, authenticated, "ingest endpoint listening (POST /v1/events)");
    }
    let models: Vec<&str> = cfg.models.iter().map(|m| m.as_str()).collect();
    tracing::info!(%admin_addr, data_dir = %data_dir.display(), models = ?models, "apportion serve started");

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

    let grace = cfg.shutdown_grace.to_std();
    let result = rt.block_on(async move {
        let mut done_rx = done_rx;
        tokio::select! {
            _ = shutdown => tracing::info!("shutdown requested; finishing the current batch"),
            r = &mut done_rx => {
                http_stop.notify_waiters();
                return match r {
                    Ok(Ok(())) => Ok(()),
                    Ok(Err(e)) => Err(e.context("processing stopped")),
                    Err(_) => Err(anyhow::anyhow!("processing thread ended unexpectedly")),
                };
            }
        }
        *deadline.lock().expect("deadline") =
            Some(std::time::Instant::now() + grace.saturating_sub(Duration::from_secs(1)));
        stop.store(true, Ordering::SeqCst);
        let r = match tokio::time::timeout(grace, done_rx).await {
            Ok(Ok(r)) => r,
            Ok(Err(_)) => Err(anyhow::anyhow!("processing thread ended unexpectedly")),
            Err(_) => Err(anyhow::anyhow!(
                "shutdown grace period of {} ms passed before the batch finished; state is consistent up to the last commit",
                grace.as_millis()
            )),
        };
        http_stop.notify_waiters();
        r
    });
    rt.shutdown_timeout(Duration::from_secs(2));
    result
}

/// SIGTERM or SIGINT, whichever comes first (the binary's shutdown signal).
pub async fn termination_signal() {
    let mut term = match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
        Ok(s) => s,
        Err(e) => {
            tracing::error!(error = %e, "cannot listen for SIGTERM; only SIGINT stops the service");
            let _ = tokio::signal::ctrl_c().await;
            return;
        }
    };
    tokio::select! {
        _ = tokio::signal::ctrl_c() => tracing::info!("SIGINT received"),
        _ = term.recv() => tracing::info!("SIGTERM received"),
    }
}
