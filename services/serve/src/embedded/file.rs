//! Following an NDJSON file (like `tail -f`): each complete line is a
//! message whose offset is the byte offset just past it.

use std::fs::File;
use std::io::{Read, Seek, SeekFrom};
use std::path::PathBuf;
use std::time::Instant;

use crate::source::{ErrorLog, InMsg};

/// A followed file and the byte position read up to.
pub struct Follower {
    path: PathBuf,
    pos: u64,
    errors: ErrorLog,
}

impl Follower {
    /// Follows `path` from byte `pos` (the end of the last committed line).
    pub fn new(path: PathBuf, pos: u64) -> Self {
        Follower { path, pos, errors: ErrorLog::default() }
    }

    /// Up to `max` complete lines after the position.
    pub fn read(&mut self, max: usize) -> Vec<InMsg> {
        let (path, pos) = (&self.path, &mut self.pos);
        let mut f = match File::open(path) {
            Ok(f) => f,
            // Not there yet (or rotated away and not yet recreated): wait.
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Vec::new(),
            Err(e) => {
                self.errors.report(&format!("cannot open the followed file {}", path.display()), &e);
                return Vec::new();
            }
        };
        let len = match f.metadata() {
            Ok(m) => m.len(),
            Err(e) => {
                self.errors.report(&format!("cannot stat the followed file {}", path.display()), &e);
                return Vec::new();
            }
        };
        if len < *pos {
            tracing::warn!(file = %path.display(), "followed file shrank; starting again from its beginning");
            *pos = 0;
        }
        if len == *pos {
            return Vec::new();
        }
        let mut buf = Vec::new();
        let want = (len - *pos).min(64 << 20);
        if let Err(e) = f.seek(SeekFrom::Start(*pos)).and_then(|_| f.take(want).read_to_end(&mut buf)) {
            self.errors.report(&format!("cannot read the followed file {}", path.display()), &e);
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
