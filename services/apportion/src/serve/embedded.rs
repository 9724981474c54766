//! Embedded mode (no Kafka): events arrive by HTTP (`POST /v1/events`, a
//! body of NDJSON lines) and/or from a followed NDJSON file; output goes to
//! rotating NDJSON files. Each source is one partition (`http/0`,
//! `file/0`) with its own watermark; an HTTP request is answered after its
//! batch is committed, with per-line results.

use std::fs::File;
use std::io::{Read, Seek, SeekFrom};
use std::path::PathBuf;
use std::sync::mpsc::{Receiver, RecvTimeoutError};
use std::time::{Duration, Instant};

use anyhow::Result;
use serde::Serialize;

use super::pipeline::{InMsg, MsgStatus, PartId, Payload, Pipeline};
use super::Source;
use crate::config::Format;

/// One HTTP ingest request.
pub struct IngestRequest {
    /// Non-empty lines with their 1-based line numbers in the body.
    pub lines: Vec<(usize, Vec<u8>)>,
    /// Where the answer goes.
    pub reply: tokio::sync::oneshot::Sender<IngestReply>,
}

/// Per-line problem in an ingest reply.
#[derive(Debug, Clone, Serialize)]
pub struct LineError {
    /// 1-based line number in the request body.
    pub line: usize,
    /// Machine-readable reason.
    pub reason: String,
    /// Detail.
    pub detail: String,
}

/// The answer to an ingest request.
#[derive(Debug, Clone, Default, Serialize)]
pub struct IngestReply {
    /// Lines applied.
    pub accepted: usize,
    /// Lines dropped as duplicates.
    pub duplicates: usize,
    /// Lines rejected (see `errors`).
    pub rejected: usize,
    /// One entry per rejected line.
    pub errors: Vec<LineError>,
}

struct Waiting {
    reply: tokio::sync::oneshot::Sender<IngestReply>,
    lines: Vec<usize>,
}

/// HTTP and file input.
pub struct EmbeddedSource {
    rx: Receiver<IngestRequest>,
    next_seq: i64,
    waiting: Vec<Waiting>,
    file: Option<(PathBuf, u64)>,
    http: PartId,
    file_part: PartId,
}

impl EmbeddedSource {
    /// Opens the embedded partitions on the pipeline.
    pub fn new(pipeline: &mut Pipeline, rx: Receiver<IngestRequest>, watch_file: Option<PathBuf>) -> Result<Self> {
        let http = PartId::new("http", 0);
        let file_part = PartId::new("file", 0);
        let committed = pipeline.open_partition(&http, Payload::Event(Format::Json))?;
        let file = match watch_file {
            Some(path) => {
                let pos = pipeline.open_partition(&file_part, Payload::Event(Format::Json))?.unwrap_or(0).max(0) as u64;
                Some((path, pos))
            }
            None => None,
        };
        Ok(EmbeddedSource { rx, next_seq: committed.map_or(0, |c| c + 1), waiting: Vec::new(), file, http, file_part })
    }

    fn read_file(&mut self, max: usize) -> Vec<InMsg> {
        let Some((path, pos)) = self.file.as_mut() else { return Vec::new() };
        let Ok(mut f) = File::open(&*path) else { return Vec::new() };
        let len = f.metadata().map(|m| m.len()).unwrap_or(0);
        if len < *pos {
            tracing::warn!(file = %path.display(), "followed file shrank; starting again from its beginning");
            *pos = 0;
        }
        if len == *pos || f.seek(SeekFrom::Start(*pos)).is_err() {
            return Vec::new();
        }
        let mut buf = Vec::new();
        let want = (len - *pos).min(64 << 20);
        if f.take(want).read_to_end(&mut buf).is_err() {
            return Vec::new();
        }
        let mut out = Vec::new();
        let mut start = 0usize;
        let now = Instant::now();
        while out.len() < max {
            let Some(nl) = buf[start..].iter().position(|b| *b == b'\n') else { break };
            let line = &buf[start..start + nl];
            let end = *pos + (start + nl + 1) as u64;
            let trimmed = line.strip_suffix(b"\r").unwrap_or(line);
            if !trimmed.iter().all(u8::is_ascii_whitespace) {
                out.push(InMsg { offset: end as i64, payload: trimmed.to_vec(), arrived: now });
            }
            start += nl + 1;
        }
        *pos += start as u64;
        out
    }
}

impl Source for EmbeddedSource {
    fn poll(&mut self, _pipeline: &mut Pipeline, max: usize, wait: Duration) -> Result<Vec<(PartId, Vec<InMsg>)>> {
        let mut http = Vec::new();
        let file = self.read_file(max);
        let first = if file.is_empty() { self.rx.recv_timeout(wait) } else { self.rx.try_recv().map_err(|_| RecvTimeoutError::Timeout) };
        let mut next = first.ok();
        while let Some(req) = next.take() {
            let now = Instant::now();
            let mut lines = Vec::with_capacity(req.lines.len());
            for (n, l) in req.lines {
                http.push(InMsg { offset: self.next_seq, payload: l, arrived: now });
                self.next_seq += 1;
                lines.push(n);
            }
            self.waiting.push(Waiting { reply: req.reply, lines });
            if http.len() < max {
                next = self.rx.try_recv().ok();
            }
        }
        let mut out = Vec::new();
        if !http.is_empty() {
            out.push((self.http.clone(), http));
        }
        if !file.is_empty() {
            out.push((self.file_part.clone(), file));
        }
        Ok(out)
    }

    fn committed(&mut self, _pipeline: &Pipeline, statuses: Vec<(PartId, Vec<MsgStatus>)>) -> Result<()> {
        let Some((_, st)) = statuses.into_iter().find(|(id, _)| *id == self.http) else { return Ok(()) };
        let mut it = st.into_iter();
        for w in self.waiting.drain(..) {
            let mut reply = IngestReply::default();
            for line in w.lines {
                match it.next() {
                    Some(MsgStatus::Accepted) | Some(MsgStatus::AlreadyApplied) => reply.accepted += 1,
                    Some(MsgStatus::Duplicate) => reply.duplicates += 1,
                    Some(MsgStatus::Rejected(r)) => {
                        reply.rejected += 1;
                        reply.errors.push(LineError { line, reason: r.reason.code().into(), detail: r.detail });
                    }
                    None => {}
                }
            }
            let _ = w.reply.send(reply);
        }
        Ok(())
    }

    fn ready(&self) -> bool {
        true
    }
}
