//! Following an NDJSON file (like `tail -F`): each complete line is a
//! message.
//!
//! A message's offset is `generation << 40 | byte offset just past the
//! line`. The generation counts the files followed at the path: it grows
//! when the path's file is replaced (rotation: another inode) or cut short
//! (truncation), so offsets keep growing and lines of a new file are never
//! taken for lines already applied. The file's identity (device and inode)
//! is committed with the offset, so a restart knows whether the path still
//! holds the same file. On rotation the old file is read to its end through
//! the handle still open before the new one is followed, so lines written
//! just before a rotation are not lost (while the service runs; a rotation
//! while it is stopped can only be noticed, and is logged).

use std::fs::File;
use std::io::{Read, Seek, SeekFrom};
use std::os::unix::fs::MetadataExt;
use std::path::PathBuf;
use std::time::Instant;

use crate::source::{ErrorLog, InMsg};

/// Bytes per generation in an offset (1 TiB).
pub const GENERATION_SHIFT: u32 = 40;
const POS_MASK: i64 = (1 << GENERATION_SHIFT) - 1;
/// The longest line read (longer ones are cut at this size and rejected as
/// too large by the parser; `max_event_bytes` is at most this).
pub const READ_LIMIT: u64 = 64 << 20;
/// The first read of a poll, grown up to READ_LIMIT while no line ends in it.
const FIRST_WINDOW: u64 = 1 << 20;

/// A file's identity: device and inode.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Identity {
    dev: u64,
    ino: u64,
}

impl Identity {
    fn of(m: &std::fs::Metadata) -> Identity {
        Identity { dev: m.dev(), ino: m.ino() }
    }

    /// The 16 bytes committed with the offset.
    pub fn to_bytes(self) -> Vec<u8> {
        let mut b = self.dev.to_be_bytes().to_vec();
        b.extend_from_slice(&self.ino.to_be_bytes());
        b
    }

    /// Reads what [`Identity::to_bytes`] wrote.
    pub fn from_bytes(b: &[u8]) -> Option<Identity> {
        (b.len() == 16).then(|| Identity {
            dev: u64::from_be_bytes(b[..8].try_into().expect("8 bytes")),
            ino: u64::from_be_bytes(b[8..].try_into().expect("8 bytes")),
        })
    }
}

/// The offset of a byte position in a generation.
pub fn offset_of(generation: u64, pos: u64) -> i64 {
    ((generation as i64) << GENERATION_SHIFT) | (pos as i64 & POS_MASK)
}

/// The generation and byte position of an offset.
pub fn split_offset(offset: i64) -> (u64, u64) {
    ((offset >> GENERATION_SHIFT) as u64, (offset & POS_MASK) as u64)
}

/// A followed file and the position read up to.
pub struct Follower {
    path: PathBuf,
    generation: u64,
    pos: u64,
    /// The file being read (kept open across rotations until read to its end).
    file: Option<(File, Identity)>,
    caught_up: bool,
    errors: ErrorLog,
    /// A line longer than READ_LIMIT not yet ended: (generation, its start,
    /// position scanned up to without finding its end).
    long_scan: Option<(u64, u64, u64)>,
}

impl Follower {
    /// Follows `path` from the committed `offset` of the file with
    /// `identity` (both `None` for a new partition).
    pub fn new(path: PathBuf, offset: Option<i64>, identity: Option<Identity>) -> Self {
        let (generation, pos) = offset.map(split_offset).unwrap_or((0, 0));
        let mut f = Follower {
            path,
            generation,
            pos,
            file: None,
            caught_up: false,
            errors: ErrorLog::default(),
            long_scan: None,
        };
        match (std::fs::File::open(&f.path), identity) {
            (Ok(file), Some(id)) => {
                let meta = file.metadata();
                match meta {
                    Ok(m) if Identity::of(&m) == id && m.len() >= pos => f.file = Some((file, id)),
                    Ok(m) if Identity::of(&m) == id => {
                        tracing::warn!(file = %f.path.display(), "the followed file was cut short while the service was stopped; following it from its beginning");
                        f.next_generation(file, id);
                    }
                    Ok(m) => {
                        tracing::warn!(file = %f.path.display(), "the followed file was replaced while the service was stopped; lines added to the old file after the last commit were not read");
                        f.next_generation(file, Identity::of(&m));
                    }
                    Err(e) => f.errors.report(&format!("cannot stat the followed file {}", f.path.display()), &e),
                }
            }
            (Ok(file), None) => match file.metadata() {
                Ok(m) => f.file = Some((file, Identity::of(&m))),
                Err(e) => f.errors.report(&format!("cannot stat the followed file {}", f.path.display()), &e),
            },
            (Err(_), _) => {}
        }
        f
    }

    fn next_generation(&mut self, file: File, id: Identity) {
        self.generation += 1;
        self.pos = 0;
        self.file = Some((file, id));
    }

    /// The identity of the file being read (committed with the offset).
    pub fn identity(&self) -> Option<Identity> {
        self.file.as_ref().map(|(_, id)| *id)
    }

    /// True when the last read found nothing new at the end of the current
    /// file.
    pub fn caught_up(&self) -> bool {
        self.caught_up
    }

    /// The path now holds another file (rotated), or the current one is
    /// shorter than the position (truncated): switch.
    fn check_replaced(&mut self) {
        let current = match std::fs::metadata(&self.path) {
            Ok(m) => m,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => return,
            Err(e) => {
                self.errors.report(&format!("cannot stat the followed file {}", self.path.display()), &e);
                return;
            }
        };
        let id = Identity::of(&current);
        match &self.file {
            Some((f, old)) if *old == id => {
                let len = f.metadata().map(|m| m.len()).unwrap_or(0);
                if len < self.pos {
                    tracing::warn!(file = %self.path.display(), "followed file cut short; following it from its beginning");
                    match File::open(&self.path) {
                        Ok(f) => self.next_generation(f, id),
                        Err(e) => {
                            self.errors.report(&format!("cannot open the followed file {}", self.path.display()), &e)
                        }
                    }
                }
            }
            _ => match File::open(&self.path) {
                Ok(f) => {
                    if self.file.is_some() {
                        tracing::info!(file = %self.path.display(), "followed file rotated; following the new file");
                        self.next_generation(f, id);
                    } else {
                        self.file = Some((f, id));
                    }
                }
                Err(e) => self.errors.report(&format!("cannot open the followed file {}", self.path.display()), &e),
            },
        }
    }

    /// Up to `max` complete lines after the position.
    pub fn read(&mut self, max: usize) -> Vec<InMsg> {
        let mut out = self.read_current(max);
        if out.is_empty() {
            // At the end of the current file: has the path moved on?
            let before = (self.generation, self.identity());
            self.check_replaced();
            if (self.generation, self.identity()) != before {
                out = self.read_current(max);
            }
        }
        self.caught_up = out.is_empty();
        out
    }

    fn read_current(&mut self, max: usize) -> Vec<InMsg> {
        let Some((f, _)) = self.file.as_mut() else { return Vec::new() };
        let len = match f.metadata() {
            Ok(m) => m.len(),
            Err(e) => {
                self.errors.report(&format!("cannot stat the followed file {}", self.path.display()), &e);
                return Vec::new();
            }
        };
        if len <= self.pos {
            return Vec::new();
        }
        // Read a window that holds at least one complete line: start small
        // (a poll takes a batch, not the whole backlog) and grow while no
        // line ends in it, up to READ_LIMIT.
        let mut buf = Vec::new();
        let mut want = (len - self.pos).min(FIRST_WINDOW);
        loop {
            buf.clear();
            if let Err(e) = f.seek(SeekFrom::Start(self.pos)).and_then(|_| f.by_ref().take(want).read_to_end(&mut buf))
            {
                self.errors.report(&format!("cannot read the followed file {}", self.path.display()), &e);
                return Vec::new();
            }
            if buf.contains(&b'\n') || want == len - self.pos || want >= READ_LIMIT {
                break;
            }
            want = (want * 8).min(READ_LIMIT).min(len - self.pos);
        }
        let mut out = Vec::new();
        let mut start = 0usize;
        let now = Instant::now();
        let wall = crate::pipeline::now_ms();
        while out.len() < max {
            let Some(nl) = buf[start..].iter().position(|b| *b == b'\n') else { break };
            let line = &buf[start..start + nl];
            let end = self.pos + (start + nl + 1) as u64;
            let trimmed = line.strip_suffix(b"\r").unwrap_or(line);
            if !trimmed.iter().all(u8::is_ascii_whitespace) {
                out.push(InMsg {
                    offset: offset_of(self.generation, end),
                    payload: trimmed.to_vec(),
                    arrived: now,
                    timestamp_ms: wall,
                });
            }
            start += nl + 1;
        }
        self.pos += start as u64;
        if out.is_empty() && buf.len() as u64 >= READ_LIMIT && !buf.contains(&b'\n') {
            // One line longer than READ_LIMIT: its first READ_LIMIT bytes
            // go on as the message (rejected as too large by the parser),
            // the rest is skipped, so the lines after it are not held up.
            if let Some(end) = self.end_of_long_line(len) {
                buf.truncate(READ_LIMIT as usize);
                out.push(InMsg {
                    offset: offset_of(self.generation, end),
                    payload: buf,
                    arrived: now,
                    timestamp_ms: wall,
                });
                self.pos = end;
                self.long_scan = None;
            }
        }
        out
    }

    /// The position just past the newline that ends the line starting at
    /// the current position (longer than READ_LIMIT), if it has been written;
    /// scans from where the last call stopped.
    fn end_of_long_line(&mut self, len: u64) -> Option<u64> {
        let (f, _) = self.file.as_mut()?;
        let mut at = match self.long_scan {
            Some((g, p, scanned)) if g == self.generation && p == self.pos => scanned,
            _ => self.pos + READ_LIMIT,
        };
        let mut chunk = Vec::with_capacity(FIRST_WINDOW as usize);
        while at < len {
            chunk.clear();
            if let Err(e) =
                f.seek(SeekFrom::Start(at)).and_then(|_| f.by_ref().take(FIRST_WINDOW).read_to_end(&mut chunk))
            {
                self.errors.report(&format!("cannot read the followed file {}", self.path.display()), &e);
                return None;
            }
            if chunk.is_empty() {
                break;
            }
            if let Some(nl) = chunk.iter().position(|b| *b == b'\n') {
                return Some(at + nl as u64 + 1);
            }
            at += chunk.len() as u64;
        }
        self.long_scan = Some((self.generation, self.pos, at));
        None
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Write;

    fn append(path: &std::path::Path, text: &str) {
        std::fs::OpenOptions::new().create(true).append(true).open(path).unwrap().write_all(text.as_bytes()).unwrap();
    }

    fn texts(msgs: &[InMsg]) -> Vec<String> {
        msgs.iter().map(|m| String::from_utf8(m.payload.clone()).unwrap()).collect()
    }

    #[test]
    fn offsets_grow_across_truncation_and_rotation() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("events.ndjson");
        append(&path, "a\nb\n");
        let mut f = Follower::new(path.clone(), None, None);
        let first = f.read(100);
        assert_eq!(texts(&first), ["a", "b"]);
        assert!(f.read(100).is_empty() && f.caught_up());
        // Truncated and rewritten: a new generation, nothing skipped.
        std::fs::write(&path, "c\n").unwrap();
        let second = f.read(100);
        assert_eq!(texts(&second), ["c"]);
        assert!(second[0].offset > first[1].offset);
        // Rotated: the old file gets a last line, then the path holds a new file.
        append(&path, "d\n");
        std::fs::rename(&path, dir.path().join("events.ndjson.1")).unwrap();
        append(&path, "e\n");
        let third = f.read(100);
        assert_eq!(texts(&third), ["d"], "the old file is read to its end first");
        let fourth = f.read(100);
        assert_eq!(texts(&fourth), ["e"]);
        assert!(fourth[0].offset > third[0].offset);
        assert_eq!(split_offset(fourth[0].offset), (2, 2));
    }

    #[test]
    fn a_restart_notices_a_replaced_file() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("events.ndjson");
        append(&path, "a\nb\n");
        let mut f = Follower::new(path.clone(), None, None);
        let msgs = f.read(100);
        let (offset, id) = (msgs[1].offset, f.identity().unwrap());
        // Same file, more lines: resume after the committed offset.
        append(&path, "c\n");
        let mut g = Follower::new(path.clone(), Some(offset), Some(id));
        assert_eq!(texts(&g.read(100)), ["c"]);
        // Replaced while stopped: the new file from its beginning, in a new generation.
        std::fs::remove_file(&path).unwrap();
        append(&path, "x\n");
        let mut h = Follower::new(path.clone(), Some(offset), Some(id));
        let got = h.read(100);
        assert_eq!(texts(&got), ["x"]);
        assert!(got[0].offset > offset);
        assert_eq!(Identity::from_bytes(&id.to_bytes()), Some(id));
    }

    #[test]
    fn a_line_longer_than_the_read_limit_does_not_stall_the_lines_after_it() {
        // Issue 15, item 9 (derived by hand): a line of READ_LIMIT + 10
        // bytes goes on cut to READ_LIMIT bytes (the parser rejects it as
        // too_large), and the line after it is read; while the long line has
        // no end yet, nothing after it is read.
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("events.ndjson");
        append(&path, "a\n");
        let long = "x".repeat(READ_LIMIT as usize + 10);
        append(&path, &long);
        let mut f = Follower::new(path.clone(), None, None);
        assert_eq!(texts(&f.read(10)), ["a"]);
        assert!(f.read(10).is_empty(), "the long line has not ended yet");
        append(&path, "\nb\n");
        let got = f.read(10);
        assert_eq!(got.len(), 1);
        assert_eq!(got[0].payload.len() as u64, READ_LIMIT);
        assert_eq!(split_offset(got[0].offset).1, 2 + long.len() as u64 + 1);
        assert_eq!(texts(&f.read(10)), ["b"]);
    }
}
