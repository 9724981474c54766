//! `apportion replay` over a file: credit a whole NDJSON input in path order
//! with the engine's replay driver (`apportion_engine::replay::two_pass`).
//!
//! Memory stays bounded for large inputs: the first pass validates every
//! line and keeps only (time, byte offset, length) of valid events (24 bytes
//! each); after sorting by (time, offset), which is (time, input order), the
//! events are read back by offset and applied through the engine's replay
//! driver. Open journeys live in the sled store behind a byte-bounded cache
//! (`cache_bytes`): they stay in memory while they fit, and the least
//! recently used ones are written to sled when they do not. With data-driven
//! models the events are applied twice: first to fit on every closed path,
//! then to credit with that one snapshot (docs/contract.md, "Models", Fitting).
//!
//! Measured figures (10M events) are in load/RESULTS.md.

use std::cell::Cell;
use std::fs::File;
use std::io::{BufRead, BufReader, IsTerminal, Read, Write};
use std::os::unix::fs::FileExt;
use std::path::PathBuf;
use std::rc::Rc;
use std::time::Instant;

use anyhow::{Context, Result};
use apportion_contract::event::parse_event_limited;
use apportion_contract::time::format_ms;
use apportion_contract::{RejectReason, Rejection, UserKey};
use apportion_engine::datadriven::PathStats;
use apportion_engine::replay::two_pass::{self, Pass};
use apportion_engine::replay::{effect_rows, event_digest, FirstSeen};
use apportion_engine::{Effect, Journey, JourneyEvent, JourneyStore, Outcome, Pseudonymizer};
use apportion_sinks::ndjson::push_line;
use apportion_store::{PartitionStore, Store, StoreError};

use crate::config::Config;
use crate::output::{OutputFile, Rejected};

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
    /// Valid events dropped unread because their `consent.measurement` is
    /// false (contract: Input events, Consent).
    pub without_consent: u64,
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
pub struct Indexed {
    file: File,
    recs: Vec<Rec>,
    _spool: Option<tempfile::NamedTempFile>,
}

/// Bytes of input read per block in the index pass (a block holds at
/// least one line, however long).
const BLOCK_BYTES: usize = 4 << 20;
/// Blocks between the reading and the parsing thread, each way.
const BLOCKS_AHEAD: usize = 2;

/// Whole lines of the input, as read, with where each starts.
#[derive(Default)]
struct Block {
    /// Byte offset of the block's first line in the input.
    offset: u64,
    data: Vec<u8>,
    /// (start in `data`, bytes including the line end) per line.
    lines: Vec<(usize, usize)>,
}

/// What parsing found on one line of the index pass.
enum Scanned {
    /// Empty or only whitespace: skipped, not counted.
    Blank,
    /// Valid, with `consent.measurement` false: counted and dropped.
    WithoutConsent,
    /// Valid but later than the newest plausible time.
    Future {
        ts: i64,
    },
    /// Valid: its time, its identity for duplicate detection and the length
    /// of the line without its end.
    Valid {
        ts: i64,
        digest: u128,
        len: u32,
    },
    Invalid(Rejection),
}

impl Block {
    /// Reads whole lines until the block holds `block_bytes` or the input
    /// ends (no lines: the end).
    fn fill(&mut self, reader: &mut impl BufRead, offset: u64, block_bytes: usize) -> std::io::Result<()> {
        self.offset = offset;
        self.data.clear();
        self.lines.clear();
        while self.data.len() < block_bytes {
            let start = self.data.len();
            let n = reader.read_until(b'\n', &mut self.data)?;
            if n == 0 {
                break;
            }
            self.lines.push((start, n));
        }
        Ok(())
    }

    fn scan(&self, max_event_bytes: usize, newest_plausible: i64) -> Vec<Scanned> {
        self.lines
            .iter()
            .map(|&(start, n)| {
                let mut body = &self.data[start..start + n];
                while let Some((&last, rest)) = body.split_last() {
                    if last == b'\n' || last == b'\r' {
                        body = rest;
                    } else {
                        break;
                    }
                }
                if body.iter().all(u8::is_ascii_whitespace) {
                    return Scanned::Blank;
                }
                match parse_event_limited(body, max_event_bytes) {
                    Ok(ev) if ev.without_consent() => Scanned::WithoutConsent,
                    Ok(ev) if ev.timestamp_ms > newest_plausible => Scanned::Future { ts: ev.timestamp_ms },
                    // parse_event_limited bounds the length by max_event_bytes (< 4 GiB).
                    Ok(ev) => match u32::try_from(body.len()) {
                        Ok(len) => Scanned::Valid { ts: ev.timestamp_ms, digest: event_digest(&ev), len },
                        Err(_) => Scanned::Invalid(Rejection::new(RejectReason::TooLarge, "event longer than 4 GiB")),
                    },
                    Err(r) => Scanned::Invalid(r),
                }
            })
            .collect()
    }
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
            let sequential =
                self.block.is_empty() || (offset >= self.block_start && offset <= next + Self::BLOCK as u64);
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

/// Reads the input once: rejects invalid lines (to `rejected`), drops
/// duplicates (first occurrence in input order wins) and sorts the valid
/// events by (time, byte offset).
pub fn index(io: &ReplayIo, cfg: &Config, rejected: &mut Rejected, summary: &mut Summary) -> Result<Indexed> {
    index_in_blocks(io, cfg, rejected, summary, BLOCK_BYTES)
}

/// [`index`], reading `block_bytes` at a time.
fn index_in_blocks(
    io: &ReplayIo,
    cfg: &Config,
    rejected: &mut Rejected,
    summary: &mut Summary,
    block_bytes: usize,
) -> Result<Indexed> {
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
    let mut offset = 0u64;
    let mut line = 0u64;
    let mut progress = Progress::new(io.progress, "reading", total);
    let mut seen = FirstSeen::default();
    // No input can hold events from after the replay runs: the newest
    // plausible event time is the start of the run plus max_future_skew
    // (docs/contract.md, "Reject reasons").
    let newest_plausible = crate::pipeline::now_ms().saturating_add(cfg.max_future_skew.ms());
    let max_event_bytes = cfg.max_event_bytes;
    // Sized once from the first lines' average length, so that neither the
    // index nor the id set doubles (and briefly holds both copies) at scale.
    let mut sized = false;
    // This thread reads blocks of lines and keeps the books in input order
    // (duplicates, rejections, the index); a second thread parses and
    // validates the block after it meanwhile. Same decisions, same order as
    // on one thread.
    let mut handle = |block: &Block, scanned: &[Scanned]| -> Result<()> {
        for (&(start, n), sc) in block.lines.iter().zip(scanned) {
            line += 1;
            let at = offset;
            offset += n as u64;
            let (ts, digest, len) = match sc {
                Scanned::Blank => continue,
                Scanned::WithoutConsent => {
                    summary.lines += 1;
                    summary.without_consent += 1;
                    continue;
                }
                Scanned::Invalid(r) => {
                    summary.lines += 1;
                    summary.rejected += 1;
                    rejected.write(line, r)?;
                    continue;
                }
                Scanned::Future { ts } => {
                    summary.lines += 1;
                    summary.rejected += 1;
                    let r = Rejection::new(
                        RejectReason::FutureTimestamp,
                        format!(
                            "event time {} is more than max_future_skew ({}) after the time replay started",
                            format_ms(*ts),
                            cfg.max_future_skew
                        ),
                    );
                    rejected.write(line, &r)?;
                    continue;
                }
                Scanned::Valid { ts, digest, len } => (*ts, *digest, *len),
            };
            summary.lines += 1;
            debug_assert_eq!(at, block.offset + start as u64);
            if !sized && (summary.lines == 4096 || offset >= total) {
                sized = true;
                let estimate = (total as f64 / offset.max(1) as f64 * summary.lines as f64 * 1.05) as usize;
                recs.reserve_exact(estimate.saturating_sub(recs.len()));
                seen.reserve(estimate.saturating_sub(seen.len()));
            }
            // Duplicates: the first occurrence in input order wins, as the
            // first arrival does in the streaming service.
            if !seen.first_digest(digest) {
                summary.duplicates += 1;
            } else {
                recs.push(Rec { ts, offset: at, len });
            }
        }
        progress.tick(offset);
        Ok(())
    };
    std::thread::scope(|scope| -> Result<()> {
        let (to_parse, parse_rx) = std::sync::mpsc::sync_channel::<Block>(BLOCKS_AHEAD);
        let (parsed_tx, parsed) = std::sync::mpsc::sync_channel::<(Block, Vec<Scanned>)>(BLOCKS_AHEAD);
        scope.spawn(move || {
            for block in parse_rx {
                let scanned = block.scan(max_event_bytes, newest_plausible);
                // A closed channel: the reading side stopped on an error.
                if parsed_tx.send((block, scanned)).is_err() {
                    return;
                }
            }
        });
        let mut spare: Vec<Block> = Vec::new();
        let mut in_flight = 0usize;
        let mut block_offset = 0u64;
        loop {
            let mut block = spare.pop().unwrap_or_default();
            block.fill(&mut reader, block_offset, block_bytes).context("reading input")?;
            if block.lines.is_empty() {
                break;
            }
            block_offset += block.data.len() as u64;
            to_parse.send(block).map_err(|_| anyhow::anyhow!("the parsing thread stopped"))?;
            in_flight += 1;
            if in_flight > BLOCKS_AHEAD {
                let (block, scanned) = parsed.recv().context("the parsing thread stopped")?;
                in_flight -= 1;
                handle(&block, &scanned)?;
                spare.push(block);
            }
        }
        drop(to_parse);
        for (block, scanned) in parsed {
            handle(&block, &scanned)?;
        }
        Ok(())
    })?;
    progress.done();
    drop(seen);
    // Offsets are unique, so an unstable (in-place) sort keeps ties in
    // input order.
    recs.sort_unstable_by_key(|r| (r.ts, r.offset));
    recs.shrink_to_fit();
    Ok(Indexed { file, recs, _spool: spool })
}

/// The store of one pass: a partition of `store` named after the pass, in
/// replay mode (it spills the least recently used journeys to sled itself
/// when they outgrow `cache_bytes`). When dropped it adds its count of
/// journeys written to sled to `spilled`.
struct PassStore {
    inner: PartitionStore,
    spilled: Rc<Cell<u64>>,
}

impl Drop for PassStore {
    fn drop(&mut self) {
        self.spilled.set(self.spilled.get() + self.inner.spilled());
    }
}

impl JourneyStore for PassStore {
    type Error = StoreError;
    fn load(&mut self, key: &UserKey) -> Result<Option<Journey>, StoreError> {
        self.inner.load(key)
    }
    fn take(&mut self, key: &UserKey) -> Result<Option<Journey>, StoreError> {
        self.inner.take(key)
    }
    fn save(&mut self, key: &UserKey, journey: Journey, wake: Option<i64>) -> Result<(), StoreError> {
        self.inner.save(key, journey, wake)
    }
    fn due(&mut self, watermark: i64) -> Result<Vec<UserKey>, StoreError> {
        self.inner.due(watermark)
    }
    fn keys(&mut self) -> Result<Vec<UserKey>, StoreError> {
        self.inner.keys()
    }
}

fn pass_store(store: &Store, cfg: &Config, pass: Pass, spilled: Rc<Cell<u64>>) -> Result<PassStore> {
    store.drop_partition(pass.name())?;
    Ok(PassStore { inner: store.partition(pass.name(), cfg.cache_bytes)?.with_auto_spill(), spilled })
}

/// Events per chunk handed from the reading thread to the applying one.
const CHUNK: usize = 4096;
/// Chunks in flight between the two threads.
const CHUNKS_AHEAD: usize = 4;

/// Hands every indexed event, in path order, to `apply`. A second thread
/// reads the lines back, parses and pseudonymizes them, chunk by chunk,
/// while this one applies the previous chunk: the order `apply` sees, and
/// so the output, is the same as on one thread.
fn apply_events(
    idx: &Indexed,
    pseudo: &Pseudonymizer,
    pass: Pass,
    show: bool,
    apply: &mut dyn FnMut(JourneyEvent) -> Result<()>,
) -> Result<()> {
    let mut progress = Progress::new(show, pass.name(), idx.recs.len() as u64);
    std::thread::scope(|scope| -> Result<()> {
        let (tx, rx) = std::sync::mpsc::sync_channel::<Result<Vec<JourneyEvent>>>(CHUNKS_AHEAD);
        scope.spawn(move || {
            let mut reader = LineReader::new(&idx.file);
            let mut buf = Vec::new();
            for chunk in idx.recs.chunks(CHUNK) {
                let read = chunk
                    .iter()
                    .map(|rec| {
                        reader.read(rec.offset, rec.len, &mut buf).context("reading input back")?;
                        let mut ev = parse_event_limited(&buf, usize::MAX).map_err(|e| {
                            anyhow::anyhow!(
                                "the input changed while replaying (event at byte offset {}): {e}",
                                rec.offset
                            )
                        })?;
                        let key = pseudo.key_of(&ev);
                        ev.user_id.clear();
                        // The byte offset is the arrival sequence (it grows with the line).
                        Ok(JourneyEvent::from_event(ev, key, rec.offset))
                    })
                    .collect::<Result<Vec<_>>>();
                let failed = read.is_err();
                // A closed channel: the applying side stopped on an error.
                if tx.send(read).is_err() || failed {
                    return;
                }
            }
        });
        let mut done = 0u64;
        for chunk in rx {
            for ev in chunk? {
                apply(ev)?;
                done += 1;
            }
            progress.tick(done);
        }
        Ok(())
    })?;
    progress.done();
    Ok(())
}

/// One pass over every indexed event with a fresh store; `emit` gets every
/// effect. Returns the number of events applied.
pub fn apply_pass(
    idx: &Indexed,
    cfg: &Config,
    pseudo: &Pseudonymizer,
    store: &Store,
    pass: Pass,
    show: bool,
    emit: impl FnMut(&Effect) -> Result<()>,
) -> Result<u64> {
    let part = pass_store(store, cfg, pass, Rc::default())?;
    let n = two_pass::apply_pass(cfg.rules(), part, |apply| apply_events(idx, pseudo, pass, show, apply), emit)?;
    store.drop_partition(pass.name())?;
    Ok(n)
}

/// The fit pass alone: the path statistics of every closed path.
pub fn fit(idx: &Indexed, cfg: &Config, pseudo: &Pseudonymizer, store: &Store, show: bool) -> Result<PathStats> {
    let mut stats = cfg.model_plan().empty_stats();
    apply_pass(idx, cfg, pseudo, store, Pass::Fit, show, |e| {
        two_pass::add_closed_path(&mut stats, e);
        Ok(())
    })?;
    Ok(stats)
}

/// Runs replay; returns the summary.
pub fn run(io: &ReplayIo, cfg: &Config, pseudo: &Pseudonymizer) -> Result<Summary> {
    let started = Instant::now();
    let mut summary = Summary::default();
    let store = crate::state_admin::open_keyed(cfg.data_dir().as_deref(), pseudo)?;
    let mut rejected = Rejected::open(io.rejected.as_deref())?;
    let idx = index(io, cfg, &mut rejected, &mut summary)?;
    rejected.finish()?;

    let mut out = OutputFile::create(&io.output)?;
    let mut paths_out = match &io.paths {
        Some(p) => Some(OutputFile::create(&p.to_string_lossy())?),
        None => None,
    };
    let spilled: Rc<Cell<u64>> = Rc::default();
    // One reusable buffer per output: an effect's rows are serialized into
    // it and written at once (serde_json alone makes many tiny writes).
    let mut line = Vec::with_capacity(4096);
    let replayed = two_pass::run(
        &cfg.model_plan(),
        cfg.rules(),
        |pass| pass_store(&store, cfg, pass, if pass == Pass::Credit { spilled.clone() } else { Rc::default() }),
        |pass, apply| apply_events(&idx, pseudo, pass, io.progress, apply),
        |e: &Effect, models| {
            if let Effect::Journey { outcome: Outcome::Converted { path, .. }, .. } = e {
                summary.conversions += 1;
                if path.is_empty() {
                    summary.unattributed += 1;
                }
            }
            let (rows, path) = effect_rows(e, models);
            line.clear();
            for r in &rows {
                push_line(&mut line, r)?;
            }
            out.write_all(&line)?;
            summary.rows += rows.len() as u64;
            if let Some(p) = path {
                summary.paths += 1;
                if let Some(w) = paths_out.as_mut() {
                    line.clear();
                    push_line(&mut line, &p)?;
                    w.write_all(&line)?;
                }
            }
            Ok(())
        },
    )?;
    out.commit()?;
    if let Some(p) = paths_out {
        p.commit()?;
    }
    for pass in [Pass::Fit, Pass::Credit] {
        store.drop_partition(pass.name())?;
    }
    summary.events = replayed.events;
    summary.spilled = spilled.get();
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
            eprint!(
                "\r{:>8} [{}{}] {:5.1}%",
                self.what,
                "#".repeat(filled.min(width)),
                " ".repeat(width - filled.min(width)),
                pct
            );
        }
    }

    fn done(&mut self) {
        if self.on {
            eprint!("\r{}\r", " ".repeat(60));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The index of `input` read `block_bytes` at a time: (time, offset,
    /// length) of each indexed event, the summary and the rejected lines.
    fn index_of(input: &str, block_bytes: usize) -> (Vec<(i64, u64, u32)>, Summary, String) {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("in.ndjson");
        std::fs::write(&path, input).unwrap();
        let rej = dir.path().join("rejected.ndjson");
        let io = ReplayIo {
            input: path.to_string_lossy().into_owned(),
            output: "-".into(),
            paths: None,
            rejected: Some(rej.clone()),
            progress: false,
        };
        let mut rejected = Rejected::open(Some(&rej)).unwrap();
        let mut summary = Summary::default();
        let idx = index_in_blocks(&io, &Config::default(), &mut rejected, &mut summary, block_bytes).unwrap();
        rejected.finish().unwrap();
        let recs = idx.recs.iter().map(|r| (r.ts, r.offset, r.len)).collect();
        (recs, summary, std::fs::read_to_string(&rej).unwrap())
    }

    // Expected values derived by hand from the lines below (line numbers
    // count every line, blank ones too; offsets are bytes from the start).
    #[test]
    fn the_index_is_the_same_whatever_the_block_size() {
        let t1 =
            r#"{"type":"touch","event_id":"t-1","user_id":"u","timestamp":"2026-03-02T00:00:00Z","channel":"email"}"#;
        let t2 =
            r#"{"type":"touch","event_id":"t-2","user_id":"u","timestamp":"2026-03-01T00:00:00Z","channel":"display"}"#;
        let c1 =
            r#"{"type":"conversion","event_id":"o-1","user_id":"u","timestamp":"2026-03-03T00:00:00Z","goal":"buy"}"#;
        let quiet = r#"{"type":"touch","event_id":"t-3","user_id":"u","timestamp":"2026-03-01T00:00:00Z","channel":"email","consent":{"measurement":false}}"#;
        // 1 t1, 2 blank, 3 not JSON, 4 t2 with CRLF, 5 t1 again (duplicate),
        // 6 without consent, 7 c1 (no final newline).
        let input = format!("{t1}\n  \nnot json\n{t2}\r\n{t1}\n{quiet}\n{c1}");
        let off4 = (t1.len() + 1 + 3 + 9) as u64;
        let off7 = off4 + t2.len() as u64 + 2 + t1.len() as u64 + 1 + quiet.len() as u64 + 1;
        let want = vec![
            (1_772_323_200_000, off4, t2.len() as u32),
            (1_772_409_600_000, 0, t1.len() as u32),
            (1_772_496_000_000, off7, c1.len() as u32),
        ];
        let (recs, summary, rejected) = index_of(&input, BLOCK_BYTES);
        assert_eq!(recs, want);
        assert_eq!((summary.lines, summary.rejected, summary.duplicates, summary.without_consent), (6, 1, 1, 1));
        let rej: serde_json::Value = serde_json::from_str(rejected.trim()).unwrap();
        assert_eq!((rej["line"].as_u64(), rej["reason"].as_str()), (Some(3), Some("invalid_json")));
        // One line per block, and blocks that end inside a line: the same.
        for block_bytes in [1, 7, 150] {
            let (r, s, j) = index_of(&input, block_bytes);
            assert_eq!(r, want, "block_bytes {block_bytes}");
            assert_eq!((s.lines, s.rejected, s.duplicates, s.without_consent), (6, 1, 1, 1));
            assert_eq!(j, rejected);
        }
    }
}
