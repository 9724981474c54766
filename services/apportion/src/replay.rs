//! `apportion replay`: credit a whole NDJSON input in event-time order.
//!
//! Memory stays bounded for large inputs: the first pass validates every
//! line and keeps only (time, byte offset, length) of valid events (24 bytes
//! each); after sorting by (time, offset), which is (time, input order), the
//! events are read back by offset and applied through the engine's replay
//! loop. Open journeys live in the sled store behind a byte-bounded cache
//! (`cache_bytes`): they stay in memory while they fit, and the least
//! recently used ones are written to sled when they do not. With data-driven
//! models the events are applied twice: first to fit on every closed path,
//! then to credit with that one snapshot (docs/contract.md, "Models" (Fitting)).
//!
//! Measured figures (10M events) are in load/RESULTS.md.

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
    /// Journey writes to sled because open journeys did not fit
    /// `cache_bytes` (credit pass); 0 when everything stayed in memory.
    pub spilled: u64,
    /// Seconds taken.
    pub seconds: f64,
}

/// One valid event of the input: where to read it back. The byte offset
/// also serves as the arrival sequence (it grows with the line number).
#[derive(Clone, Copy)]
struct Rec {
    ts: i64,
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
            // Only a read at or just past the current block (input in time
            // order) refills the block; a jump elsewhere (unsorted input)
            // reads just its line, so it does not copy a whole block per event.
            let next = self.block_start + self.block.len() as u64;
            let sequential = self.block.is_empty() || (offset >= self.block_start && offset <= next + Self::BLOCK as u64);
            if len > Self::BLOCK || !sequential {
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
    let mut recs: Vec<Rec> = Vec::new();
    let mut buf = Vec::with_capacity(4096);
    let mut offset = 0u64;
    let mut line = 0u64;
    let mut progress = Progress::new(io.progress, "reading", total);
    let mut seen: HashSet<u128> = HashSet::new();
    // Sized once from the first lines' average length, so that neither the
    // index nor the id set doubles (and briefly holds both copies) at scale.
    let mut sized = false;
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
        if !sized && (summary.lines == 4096 || offset >= total) {
            sized = true;
            let estimate = (total as f64 / offset.max(1) as f64 * summary.lines as f64 * 1.05) as usize;
            recs.reserve_exact(estimate.saturating_sub(recs.len()));
            seen.reserve(estimate.saturating_sub(seen.len()));
        }
        match parse_event_limited(body, cfg.max_event_bytes) {
            Ok(ev) => {
                // Duplicates: the first occurrence in input order wins, as
                // the first arrival does in the streaming service.
                if ev.kind != EventKind::Erase && !seen.insert(event_id_digest(&ev.event_id)) {
                    summary.duplicates += 1;
                } else {
                    // parse_event_limited bounds the length by max_event_bytes (< 4 GiB).
                    let len = u32::try_from(body.len()).context("event longer than 4 GiB")?;
                    recs.push(Rec { ts: ev.timestamp_ms, offset: start, len });
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
    // Offsets are unique, so an unstable (in-place) sort keeps ties in
    // input order.
    recs.sort_unstable_by_key(|r| (r.ts, r.offset));
    recs.shrink_to_fit();
    Ok(Indexed { file, recs, _spool: spool })
}

/// What one pass over the indexed events did.
pub(crate) struct Applied {
    /// Events applied.
    pub events: u64,
    /// Journeys written to sled because the cache was over `cache_bytes`.
    pub spilled: u64,
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
) -> Result<Applied> {
    let mut part = store.partition(pass, cfg.cache_bytes)?;
    let mut replayer = Replayer::new(cfg.rules(), &mut part);
    let mut reader = LineReader::new(&idx.file);
    let mut buf = Vec::new();
    let mut events = 0u64;
    let mut progress = Progress::new(show, pass, idx.recs.len() as u64);
    for (i, rec) in idx.recs.iter().enumerate() {
        reader.read(rec.offset, rec.len, &mut buf).context("reading input back")?;
        let mut ev = parse_event_limited(&buf, usize::MAX).map_err(|e| {
            anyhow::anyhow!("the input changed while replaying (event at byte offset {}): {e}", rec.offset)
        })?;
        let key = pseudo.key_for(&ev.user_id);
        ev.user_id.clear();
        // Duplicates were dropped while indexing: no second id set here, so
        // nothing comes back as a duplicate.
        match replayer.push(KeyedEvent::from_event(ev, key, rec.offset), "")? {
            Pushed::Duplicate => {}
            Pushed::Applied(effects) => {
                events += 1;
                for e in &effects {
                    emit(e)?;
                }
            }
        }
        if i % 1024 == 1023 {
            // No durability needed: write to sled only what does not fit.
            replayer.store_mut().spill_if_over_budget()?;
        }
        progress.tick(i as u64 + 1);
    }
    for e in &replayer.finish()? {
        emit(e)?;
    }
    progress.done();
    drop(replayer);
    let spilled = part.spilled();
    drop(part);
    store.drop_partition(pass)?;
    Ok(Applied { events, spilled })
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
    let applied = apply_all(&idx, cfg, pseudo, &store, "credit", io.progress, |e| {
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
    summary.events = applied.events;
    summary.spilled = applied.spilled;
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

