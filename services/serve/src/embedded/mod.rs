//! Embedded mode (no Kafka): events arrive by HTTP (`POST /v1/events`, a
//! body of NDJSON lines) and/or from a followed NDJSON file; output goes to
//! rotating NDJSON files. Each source is one partition (`http/0`,
//! `file/0`) with its own watermark; an HTTP request's lines go into
//! batches of at most the batch limit, and the request is answered after
//! the batch holding its last line is committed, with per-line results.

pub mod file;
pub mod http;

use std::path::PathBuf;
use std::sync::mpsc::{Receiver, RecvTimeoutError};
use std::time::{Duration, Instant};

use anyhow::Result;

use crate::config::Format;
use crate::pipeline::Pipeline;
use crate::source::{InMsg, MsgStatus, PartId, Payload, Source};
use file::{Follower, Identity};
use http::{IngestReply, IngestRequest, LineError};

/// The lines of one request taken into the current batch; `reply` is set
/// on the segment holding the request's last line.
struct Waiting {
    reply: Option<tokio::sync::oneshot::Sender<IngestReply>>,
    lines: Vec<usize>,
    /// The poll that took these lines.
    poll: u64,
}

/// A request whose lines are partly taken: those from `at` on remain.
struct Current {
    body: axum::body::Bytes,
    at: http::Cursor,
    reply: tokio::sync::oneshot::Sender<IngestReply>,
}

/// HTTP and file input.
pub struct EmbeddedSource {
    rx: Receiver<IngestRequest>,
    next_seq: i64,
    waiting: Vec<Waiting>,
    /// Polls counted so far.
    polls: u64,
    /// Polls that returned HTTP lines and are not committed yet, oldest
    /// first: the loop acknowledges batches in the order polled, and may
    /// poll the next one before acknowledging this one.
    unacknowledged: std::collections::VecDeque<u64>,
    /// The request being taken, when it did not fit into one batch.
    current: Option<Current>,
    /// The reply of the oldest request not yet answered, counted over the
    /// batches committed so far (requests are taken in order).
    partial: IngestReply,
    file: Option<Follower>,
    http: PartId,
    file_part: PartId,
    /// The last poll left HTTP requests waiting (a backlog).
    http_backlog: bool,
}

impl EmbeddedSource {
    /// Opens the embedded partitions on the pipeline.
    pub fn new(pipeline: &mut Pipeline, rx: Receiver<IngestRequest>, watch_file: Option<PathBuf>) -> Result<Self> {
        let http = PartId::new("http", 0);
        let file_part = PartId::new("file", 0);
        let committed = pipeline.open_partition(&http, Payload::Event(Format::Json))?;
        let file = match watch_file {
            Some(path) => {
                let offset = pipeline.open_partition(&file_part, Payload::Event(Format::Json))?;
                let identity = pipeline.source_position(&file_part)?.and_then(|b| Identity::from_bytes(&b));
                Some(Follower::new(path, offset, identity))
            }
            None => None,
        };
        Ok(EmbeddedSource {
            rx,
            next_seq: committed.map_or(0, |c| c + 1),
            waiting: Vec::new(),
            polls: 0,
            unacknowledged: std::collections::VecDeque::new(),
            current: None,
            partial: IngestReply::default(),
            file,
            http,
            file_part,
            http_backlog: false,
        })
    }
}

impl Source for EmbeddedSource {
    fn poll(&mut self, pipeline: &mut Pipeline, max: usize, wait: Duration) -> Result<Vec<(PartId, Vec<InMsg>)>> {
        let mut http = Vec::new();
        let file = self.file.as_mut().map(|f| f.read(max)).unwrap_or_default();
        if let Some(id) = self.file.as_ref().and_then(|f| f.identity()) {
            if !file.is_empty() {
                pipeline.set_source_position(&self.file_part, id.to_bytes());
            }
        }
        let max = max.max(1);
        let now = Instant::now();
        let wall = crate::pipeline::now_ms();
        let mut first = true;
        self.polls += 1;
        let poll = self.polls;
        while http.len() < max {
            let mut cur = match self.current.take() {
                Some(c) => c,
                None => {
                    let req = if first && file.is_empty() && http.is_empty() {
                        self.rx.recv_timeout(wait).ok()
                    } else {
                        self.rx.try_recv().map_err(|_| RecvTimeoutError::Timeout).ok()
                    };
                    match req {
                        Some(r) => Current { body: r.body, at: http::Cursor::default(), reply: r.reply },
                        None => break,
                    }
                }
            };
            first = false;
            let mut lines = Vec::new();
            let mut done = false;
            while http.len() < max {
                match http::next_line(&cur.body, &mut cur.at) {
                    Some((n, l)) => {
                        http.push(InMsg {
                            offset: self.next_seq,
                            payload: l.to_vec(),
                            arrived: now,
                            timestamp_ms: wall,
                        });
                        self.next_seq += 1;
                        lines.push(n);
                    }
                    None => {
                        done = true;
                        break;
                    }
                }
            }
            // The end of the body may be blank lines only.
            if !done && http::next_line(&cur.body, &mut { cur.at }).is_none() {
                done = true;
            }
            if done {
                self.waiting.push(Waiting { reply: Some(cur.reply), lines, poll });
            } else {
                self.waiting.push(Waiting { reply: None, lines, poll });
                self.current = Some(cur);
            }
        }
        self.http_backlog = http.len() >= max || self.current.is_some();
        let mut out = Vec::new();
        if !http.is_empty() {
            self.unacknowledged.push_back(poll);
            out.push((self.http.clone(), http));
        }
        if !file.is_empty() {
            out.push((self.file_part.clone(), file));
        }
        Ok(out)
    }

    fn committed(&mut self, _pipeline: &Pipeline, statuses: Vec<(PartId, Vec<MsgStatus>)>) -> Result<()> {
        let Some((_, st)) = statuses.into_iter().find(|(id, _)| *id == self.http) else { return Ok(()) };
        // The oldest unacknowledged poll with HTTP lines is this batch: its
        // requests, and those of earlier polls without lines (empty bodies).
        let upto = self.unacknowledged.pop_front().unwrap_or(u64::MAX);
        let taken = self.waiting.iter().take_while(|w| w.poll <= upto).count();
        let mut it = st.into_iter();
        for w in self.waiting.drain(..taken) {
            let reply = &mut self.partial;
            for line in w.lines {
                match it.next() {
                    Some(MsgStatus::Accepted) | Some(MsgStatus::AlreadyApplied) | Some(MsgStatus::Progress) => {
                        reply.accepted += 1
                    }
                    Some(MsgStatus::Duplicate) => reply.duplicates += 1,
                    Some(MsgStatus::WithoutConsent) => reply.without_consent += 1,
                    Some(MsgStatus::Rejected(r)) => {
                        reply.reject(LineError { line, reason: r.reason.code().into(), detail: r.detail })
                    }
                    None => {}
                }
            }
            if let Some(tx) = w.reply {
                let _ = tx.send(std::mem::take(&mut self.partial));
            }
        }
        Ok(())
    }

    fn ready(&self) -> bool {
        true
    }

    fn caught_up(&self, part: &PartId) -> bool {
        if *part == self.http {
            !self.http_backlog
        } else if *part == self.file_part {
            self.file.as_ref().is_some_and(|f| f.caught_up())
        } else {
            false
        }
    }
}
