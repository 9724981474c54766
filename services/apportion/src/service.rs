//! Starting and stopping `serve`: logging, store, metrics, HTTP listeners,
//! the processing thread, signals and the shutdown grace period.

use std::io::IsTerminal;
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use anyhow::{bail, Context, Result};
use apportion_engine::Pseudonymizer;
use apportion_sinks::Sink;
use apportion_store::Store;

use crate::config::{Config, LogFormat};
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

    let (source, sinks, ingest): (Box<dyn Source>, Vec<Box<dyn Sink>>, Option<_>) = match &cfg.kafka {
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
