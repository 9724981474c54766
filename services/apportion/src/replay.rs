//! `apportion replay`: credit a whole NDJSON input in event-time order.
//!
//! Memory stays bounded for large inputs: the first pass validates every
//! line and keeps only (time, line number, byte offset, length) of valid
//! events (32 bytes each); after a stable sort the events are read back by
//! offset, applied through the engine's replay loop, and open journeys live
//! in the sled store behind a byte-bounded cache. With data-driven models the
//! events are applied twice: first to fit on every closed path, then to
//! credit with that one snapshot (DESIGN.md, "Fitting").

use std::collections::HashSet;
use std::fs::File;
use std::io::{BufRead, BufReader, IsTerminal, Read, Write};
use std::os::unix::fs::FileExt;
use std::path::PathBuf;
use std::time::Instant;

use anyhow::{Context, Result};
use apportion_engine::datadriven::PathStats;
use apportion_engine::event::parse_event_limited;
use apportion_engine::processor::KeyedEvent;
use apportion_engine::replay::{event_id_digest, effect_rows, Pushed, Replayer};
use apportion_engine::{EventKind, Model, Outcome, Pseudonymizer};
use apportion_store::Store;

use crate::config::Config;
use crate::models::build_models;
use crate::output::{AtomicFile, Rejected};

/// Where replay reads and writes.
pub struct ReplayIo {
    /// NDJSON input, `-` for stdin.
    pub input: String,
    /// Credit rows, `-` for stdout.
    pub output: String,
    /// Path rows (optional).
    pub paths: Option<PathBuf>,
    /// Rejected lines (optional; otherwise the first few go to stderr).
    pub rejected: Option<PathBuf>,
    /// Show progress on stderr (when it is a terminal).
    pub progress: bool,
}

/// Counts reported at the end.
#[derive(Debug, Default, Clone, serde::Serialize)]
pub struct Summary {
    /// Non-empty input lines.
    pub lines: u64,
    /// Valid events applied (duplicates excluded).
    pub events: u64,
    /// Conversions credited.
    pub conversions: u64,
    /// Conversions without an eligible touch.
    pub unattributed: u64,
    /// Lines rejected.
    pub rejected: u64,
    /// Duplicate events dropped.
    pub duplicates: u64,
    /// Credit rows written.
    pub rows: u64,
    /// Closed paths.
    pub paths: u64,
    /// Seconds taken.
    pub seconds: f64,
}

#[derive(Clone, Copy)]
struct Rec {
    ts: i64,
    line: u64,
    offset: u64,
    len: u32,
}

/// The input file with an index of its valid events.
pub(crate) struct Indexed {
    file: File,
    recs: Vec<Rec>,
    _spool: Option<tempfile::NamedTempFile>,
}

/// Reads lines back by offset with a small block cache (sorted input reads
/// sequentially; unsorted input falls back to positioned reads).
struct LineReader<'a> {
    file: &'a File,
    block: Vec<u8>,
    block_start: u64,
}

impl<'a> LineReader<'a> {
    const BLOCK: usize = 1 << 20;

    fn new(file: &'a File) -> Self {
        LineReader { file, block: Vec::new(), block_start: 0 }
    }

    fn read(&mut self, offset: u64, len: u32, buf: &mut Vec<u8>) -> std::io::Result<()> {
        let len = len as usize;
        let end = offset + len as u64;
        if offset < self.block_start || end > self.block_start + self.block.len() as u64 {
            if len > Self::BLOCK {
                buf.resize(len, 0);
                return self.file.read_exact_at(buf, offset);
            }
            self.block.resize(Self::BLOCK, 0);
            let mut got = 0;
            while got < Self::BLOCK {
                let n = self.file.read_at(&mut self.block[got..], offset + got as u64)?;
                if n == 0 {
                    break;
                }
                got += n;
            }
            self.block.truncate(got);
            self.block_start = offset;
            if got < len {
                return Err(std::io::Error::new(std::io::ErrorKind::UnexpectedEof, "input changed while replaying"));
            }
        }
        let s = (offset - self.block_start) as usize;
        buf.clear();
        buf.extend_from_slice(&self.block[s..s + len]);
        Ok(())
    }
}

pub(crate) fn index(io: &ReplayIo, cfg: &Config, rejected: &mut Rejected, summary: &mut Summary) -> Result<Indexed> {
    let (file, spool) = if io.input == "-" {
        let mut spool = tempfile::NamedTempFile::new().context("creating a spool file for stdin")?;
        std::io::copy(&mut std::io::stdin().lock(), spool.as_file_mut()).context("reading stdin")?;
        (spool.reopen()?, Some(spool))
    } else {
        (File::open(&io.input).with_context(|| format!("cannot open input {}", io.input))?, None)
    };
    let total = file.metadata().map(|m| m.len()).unwrap_or(0);
    let mut reader = BufReader::with_capacity(1 << 20, (&file).take(u64::MAX));
    let mut recs = Vec::new();
    let mut buf = Vec::with_capacity(4096);
    let mut offset = 0u64;
    let mut line = 0u64;
    let mut progress = Progress::new(io.progress, "reading", total);
    let mut seen: HashSet<u128> = HashSet::new();
    loop {
        buf.clear();
        let n = reader.read_until(b'\n', &mut buf).context("reading input")?;
        if n == 0 {
            break;
        }
        line += 1;
        let start = offset;
        offset += n as u64;
        let mut body = &buf[..];
        while let Some((&last, rest)) = body.split_last() {
            if last == b'\n' || last == b'\r' {
                body = rest;
            } else {
                break;
            }
        }
        if body.iter().all(u8::is_ascii_whitespace) {
            continue;
        }
        summary.lines += 1;
        match parse_event_limited(body, cfg.max_event_bytes) {
            Ok(ev) => {
                // Duplicates: the first occurrence in input order wins, as
                // the first arrival does in the streaming service.
                if ev.kind != EventKind::Erase && !seen.insert(event_id_digest(&ev.event_id)) {
                    summary.duplicates += 1;
                } else {
                    recs.push(Rec { ts: ev.timestamp_ms, line, offset: start, len: body.len() as u32 });
                }
            }
            Err(r) => {
                summary.rejected += 1;
                rejected.write(line, &r)?;
            }
        }
        progress.tick(offset);
    }
    progress.done();
    drop(seen);
    recs.sort_by_key(|r| (r.ts, r.line));
    Ok(Indexed { file, recs, _spool: spool })
}

/// Applies every indexed event once. `emit` receives each effect.
pub(crate) fn apply_all(
    idx: &Indexed,
    cfg: &Config,
    pseudo: &Pseudonymizer,
    store: &Store,
    pass: &str,
    show: bool,
    mut emit: impl FnMut(&apportion_engine::Effect) -> Result<()>,
) -> Result<(u64, u64)> {
    let mut part = store.partition(pass, cfg.cache_bytes)?;
    let mut replayer = Replayer::new(cfg.rules(), &mut part);
    let mut reader = LineReader::new(&idx.file);
    let mut buf = Vec::new();
    let (mut events, mut dups) = (0u64, 0u64);
    let mut progress = Progress::new(show, pass, idx.recs.len() as u64);
    for (i, rec) in idx.recs.iter().enumerate() {
        reader.read(rec.offset, rec.len, &mut buf).context("reading input back")?;
        let mut ev = parse_event_limited(&buf, usize::MAX)
            .map_err(|e| anyhow::anyhow!("input line {} changed while replaying: {e}", rec.line))?;
        let key = pseudo.key_for(&ev.user_id);
        ev.user_id.clear();
        // Duplicates were dropped while indexing: no second id set here.
        match replayer.push(KeyedEvent::from_event(ev, key, rec.line), "")? {
            Pushed::Duplicate => dups += 1,
            Pushed::Applied(effects) => {
                events += 1;
                for e in &effects {
                    emit(e)?;
                }
            }
        }
        if i % 50_000 == 49_999 {
            // Bounded sled batches; the cache evicts above its byte budget.
            replayer.store_mut().commit(false)?;
        }
        progress.tick(i as u64 + 1);
    }
    for e in &replayer.finish()? {
        emit(e)?;
    }
    progress.done();
    drop(replayer);
    drop(part);
    store.drop_partition(pass)?;
    Ok((events, dups))
}

/// Runs replay; returns the summary.
pub fn run(io: &ReplayIo, cfg: &Config, pseudo: &Pseudonymizer) -> Result<Summary> {
    let started = Instant::now();
    let mut summary = Summary::default();
    let store = match cfg.data_dir() {
        Some(dir) => Store::open(&dir)?,
        None => Store::temporary()?,
    };
    let mut rejected = Rejected::open(io.rejected.as_deref())?;
    let idx = index(io, cfg, &mut rejected, &mut summary)?;
    rejected.finish()?;

    let data_driven = cfg.models.iter().any(|m| m == "shapley" || m == "markov");
    let stats = if data_driven {
        let mut stats = PathStats::new(cfg.markov_order);
        apply_all(&idx, cfg, pseudo, &store, "fit", io.progress, |e| {
            if let apportion_engine::Effect::Journey { outcome, .. } = e {
                if let Some((converted, path)) = outcome.closed_path() {
                    let chans: Vec<&str> = path.iter().map(|t| t.channel.as_str()).collect();
                    stats.add_path(&chans, converted);
                }
            }
            Ok(())
        })?;
        Some(stats)
    } else {
        None
    };
    let models: Vec<Box<dyn Model>> = build_models(cfg, stats.as_ref())?;

    let mut out = AtomicFile::create(&io.output)?;
    let mut paths_out = match &io.paths {
        Some(p) => Some(AtomicFile::create(&p.to_string_lossy())?),
        None => None,
    };
    let (events, dups) = apply_all(&idx, cfg, pseudo, &store, "credit", io.progress, |e| {
        if let apportion_engine::Effect::Journey { outcome: Outcome::Converted { path, .. }, .. } = e {
            summary.conversions += 1;
            if path.is_empty() {
                summary.unattributed += 1;
            }
        }
        let (rows, path) = effect_rows(e, &models);
        for r in &rows {
            serde_json::to_writer(&mut out, r)?;
            out.write_all(b"\n")?;
        }
        summary.rows += rows.len() as u64;
        if let Some(p) = path {
            summary.paths += 1;
            if let Some(w) = paths_out.as_mut() {
                serde_json::to_writer(&mut *w, &p)?;
                w.write_all(b"\n")?;
            }
        }
        Ok(())
    })?;
    out.commit()?;
    if let Some(p) = paths_out {
        p.commit()?;
    }
    summary.events = events;
    summary.duplicates += dups;
    summary.seconds = started.elapsed().as_secs_f64();
    Ok(summary)
}

/// A progress line on stderr, only when stderr is a terminal.
struct Progress {
    on: bool,
    what: String,
    total: u64,
    last: Instant,
}

impl Progress {
    fn new(want: bool, what: &str, total: u64) -> Self {
        Progress { on: want && std::io::stderr().is_terminal(), what: what.into(), total, last: Instant::now() }
    }

    fn tick(&mut self, done: u64) {
        if self.on && self.last.elapsed().as_millis() >= 250 {
            self.last = Instant::now();
            let pct = if self.total > 0 { done as f64 * 100.0 / self.total as f64 } else { 0.0 };
            let width = 30usize;
            let filled = ((pct / 100.0) * width as f64) as usize;
            eprint!("\r{:>8} [{}{}] {:5.1}%", self.what, "#".repeat(filled.min(width)), " ".repeat(width - filled.min(width)), pct);
        }
    }

    fn done(&mut self) {
        if self.on {
            eprint!("\r{}\r", " ".repeat(60));
        }
    }
}

