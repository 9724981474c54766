//! Rotating NDJSON files: `credit-<n>.ndjson`, `paths-<n>.ndjson`,
//! `dead-letter-<n>.ndjson` and `erasures-<n>.ndjson` (audit records of
//! erasures) in one directory. A file is written under a
//! `.partial` name and renamed when it reaches the size limit or the sink
//! closes, so a reader that ignores `*.partial` never sees half a file.
//!
//! After a crash (kill -9, power loss) a `.partial` file may end in a torn
//! line: the part of a batch written before the crash. Opening the sink cuts
//! every `.partial` file back to its last complete line before sealing it.
//! Complete lines of a batch that was not committed stay: the batch is
//! delivered again and its rows, with the same ids, come twice (at least
//! once; readers deduplicate on `credit_id` / `path_id`).

use std::fs::{File, OpenOptions};
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::{OutputBatch, Sink, SinkError};

/// Appends `row` to `buf` as one NDJSON line (JSON and a newline). Callers
/// reuse `buf` and write it at once: serde_json alone makes many tiny writes.
pub fn push_line<T: Serialize>(buf: &mut Vec<u8>, row: &T) -> serde_json::Result<()> {
    serde_json::to_writer(&mut *buf, row)?;
    buf.push(b'\n');
    Ok(())
}

struct Rotating {
    dir: PathBuf,
    stem: &'static str,
    limit: u64,
    seq: u64,
    current: Option<(BufWriter<File>, PathBuf, u64)>,
    /// Reusable buffer of one serialized row (no allocation per row).
    line: Vec<u8>,
}

impl Rotating {
    fn new(dir: &Path, stem: &'static str, limit: u64) -> std::io::Result<Self> {
        // Continue numbering after existing files; finish leftovers of a crash.
        let mut seq = 0;
        for e in std::fs::read_dir(dir)? {
            let name = e?.file_name().to_string_lossy().into_owned();
            let Some(rest) = name.strip_prefix(&format!("{stem}-")) else { continue };
            let num = rest.split('.').next().and_then(|n| n.parse::<u64>().ok());
            if let Some(n) = num {
                seq = seq.max(n);
                if name.ends_with(".partial") {
                    cut_to_last_line(&dir.join(&name))?;
                    let done = dir.join(name.trim_end_matches(".partial"));
                    std::fs::rename(dir.join(&name), done)?;
                    crate::atomic::sync_dir(dir)?;
                }
            }
        }
        Ok(Rotating { dir: dir.to_path_buf(), stem, limit, seq, current: None, line: Vec::new() })
    }

    fn write_all<T: Serialize>(&mut self, rows: &[T]) -> std::io::Result<()> {
        for r in rows {
            if self.current.is_none() {
                self.seq += 1;
                let path = self.dir.join(format!("{}-{:06}.ndjson.partial", self.stem, self.seq));
                let f = OpenOptions::new().create(true).append(true).open(&path)?;
                self.current = Some((BufWriter::new(f), path, 0));
            }
            let (w, _, size) = self.current.as_mut().expect("opened above");
            self.line.clear();
            push_line(&mut self.line, r).map_err(std::io::Error::other)?;
            w.write_all(&self.line)?;
            *size += self.line.len() as u64;
            if *size >= self.limit {
                self.seal()?;
            }
        }
        Ok(())
    }

    fn sync(&mut self) -> std::io::Result<()> {
        if let Some((w, _, _)) = self.current.as_mut() {
            w.flush()?;
            w.get_ref().sync_data()?;
        }
        Ok(())
    }

    fn seal(&mut self) -> std::io::Result<()> {
        if let Some((mut w, path, _)) = self.current.take() {
            w.flush()?;
            w.get_ref().sync_all()?;
            let done = path.with_extension("");
            std::fs::rename(&path, done)?;
            crate::atomic::sync_dir(&self.dir)?;
        }
        Ok(())
    }
}

/// Cuts `path` back to just after its last newline (nothing when it has
/// none), so a line torn by a crash is not kept. Returns the bytes removed.
pub fn cut_to_last_line(path: &Path) -> std::io::Result<u64> {
    use std::io::{Read, Seek, SeekFrom};
    let mut f = OpenOptions::new().read(true).write(true).open(path)?;
    let len = f.metadata()?.len();
    let mut end = len;
    let mut buf = vec![0u8; 64 << 10];
    let keep = loop {
        if end == 0 {
            break 0;
        }
        let start = end.saturating_sub(buf.len() as u64);
        let n = (end - start) as usize;
        f.seek(SeekFrom::Start(start))?;
        f.read_exact(&mut buf[..n])?;
        if let Some(i) = buf[..n].iter().rposition(|b| *b == b'\n') {
            break start + i as u64 + 1;
        }
        end = start;
    };
    if keep < len {
        f.set_len(keep)?;
        f.sync_all()?;
    }
    Ok(len - keep)
}

/// The embedded-mode file sink.
pub struct NdjsonSink {
    credit: Rotating,
    paths: Rotating,
    dead: Rotating,
    erasures: Rotating,
}

impl NdjsonSink {
    /// Opens the sink in `dir`, rotating files after `rotate_bytes`.
    pub fn open(dir: &Path, rotate_bytes: u64) -> Result<Self, SinkError> {
        let err = |e: std::io::Error| SinkError::fatal("file", format!("{}: {e}", dir.display()));
        std::fs::create_dir_all(dir).map_err(err)?;
        let limit = rotate_bytes.max(1);
        Ok(NdjsonSink {
            credit: Rotating::new(dir, "credit", limit).map_err(err)?,
            paths: Rotating::new(dir, "paths", limit).map_err(err)?,
            dead: Rotating::new(dir, "dead-letter", limit).map_err(err)?,
            erasures: Rotating::new(dir, "erasures", limit).map_err(err)?,
        })
    }
}

impl Sink for NdjsonSink {
    fn name(&self) -> &'static str {
        "file"
    }

    fn write(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        let err = |e: std::io::Error| SinkError::retry("file", e.to_string());
        self.credit.write_all(&batch.credit).map_err(err)?;
        self.paths.write_all(&batch.paths).map_err(err)?;
        self.dead.write_all(&batch.dead_letters).map_err(err)?;
        self.erasures.write_all(&batch.erasures).map_err(err)?;
        self.credit.sync().map_err(err)?;
        self.paths.sync().map_err(err)?;
        self.dead.sync().map_err(err)?;
        self.erasures.sync().map_err(err)?;
        Ok(())
    }

    fn close(&mut self) -> Result<(), SinkError> {
        let err = |e: std::io::Error| SinkError::fatal("file", e.to_string());
        self.credit.seal().map_err(err)?;
        self.paths.seal().map_err(err)?;
        self.dead.seal().map_err(err)?;
        self.erasures.seal().map_err(err)?;
        Ok(())
    }
}

/// Reads every credit row from the sealed and open files of `dir` (tests, demo).
pub fn read_credit_rows(dir: &Path) -> std::io::Result<Vec<apportion_contract::CreditRow>> {
    let mut files: Vec<PathBuf> = std::fs::read_dir(dir)?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.file_name().is_some_and(|n| n.to_string_lossy().starts_with("credit-")))
        .collect();
    files.sort();
    let mut out = Vec::new();
    for f in files {
        for line in std::fs::read_to_string(&f)?.lines() {
            out.push(serde_json::from_str(line).map_err(std::io::Error::other)?);
        }
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A `.partial` file torn by a crash is cut back to its last complete
    /// line, then sealed; numbering goes on after it.
    #[test]
    fn a_torn_last_line_is_cut_on_open() {
        let dir = tempfile::tempdir().unwrap();
        let torn = dir.path().join("credit-000003.ndjson.partial");
        std::fs::write(&torn, "{\"a\":1}\n{\"b\":2}\n{\"c\":").unwrap();
        let empty = dir.path().join("paths-000001.ndjson.partial");
        std::fs::write(&empty, "{\"half").unwrap();
        let mut sink = NdjsonSink::open(dir.path(), 1 << 20).unwrap();
        let sealed = dir.path().join("credit-000003.ndjson");
        assert_eq!(std::fs::read_to_string(&sealed).unwrap(), "{\"a\":1}\n{\"b\":2}\n");
        assert_eq!(std::fs::read_to_string(dir.path().join("paths-000001.ndjson")).unwrap(), "");
        assert!(!torn.exists() && !empty.exists());
        sink.write(&OutputBatch::default()).unwrap();
        sink.close().unwrap();
        // A long file without any newline near its end is scanned backwards.
        let long = dir.path().join("x.partial");
        let mut text = "{\"ok\":1}\n".to_string();
        text.push_str(&"z".repeat(200_000));
        std::fs::write(&long, &text).unwrap();
        assert_eq!(cut_to_last_line(&long).unwrap(), 200_000);
        assert_eq!(std::fs::read_to_string(&long).unwrap(), "{\"ok\":1}\n");
    }
}
