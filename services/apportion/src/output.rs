//! Output files: written under a temporary name and renamed into place on
//! success, so a reader never sees half a file; `-` means stdout.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use apportion_engine::Rejection;

/// A file written atomically (or stdout).
pub struct AtomicFile {
    inner: BufWriter<Box<dyn Write>>,
    target: Option<(tempfile::NamedTempFile, PathBuf)>,
}

impl AtomicFile {
    /// Creates the writer; `-` is stdout.
    pub fn create(path: &str) -> Result<AtomicFile> {
        if path == "-" {
            return Ok(AtomicFile { inner: BufWriter::with_capacity(1 << 20, Box::new(std::io::stdout())), target: None });
        }
        let target = PathBuf::from(path);
        let dir = target.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(Path::new("."));
        std::fs::create_dir_all(dir).with_context(|| format!("cannot create directory {}", dir.display()))?;
        let tmp = tempfile::Builder::new()
            .prefix(".apportion-")
            .suffix(".partial")
            .tempfile_in(dir)
            .with_context(|| format!("cannot create a file in {}", dir.display()))?;
        let f: File = tmp.reopen()?;
        Ok(AtomicFile { inner: BufWriter::with_capacity(1 << 20, Box::new(f)), target: Some((tmp, target)) })
    }

    /// Flushes and moves the file into place.
    pub fn commit(mut self) -> Result<()> {
        self.inner.flush().context("writing output")?;
        drop(self.inner);
        if let Some((tmp, target)) = self.target {
            tmp.as_file().sync_all().ok();
            tmp.persist(&target).with_context(|| format!("cannot move output into place at {}", target.display()))?;
        }
        Ok(())
    }
}

impl Write for AtomicFile {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.inner.write(buf)
    }
    fn flush(&mut self) -> std::io::Result<()> {
        self.inner.flush()
    }
}

/// The rejected-lines output: one JSON object per rejected line with its
/// line number, reason code and detail (never the line itself, which may
/// hold a raw user id). Without a file, the first few go to stderr.
pub struct Rejected {
    file: Option<AtomicFile>,
    shown: u64,
}

impl Rejected {
    const STDERR_LIMIT: u64 = 20;

    /// Opens the rejected file, if any.
    pub fn open(path: Option<&Path>) -> Result<Rejected> {
        let file = match path {
            Some(p) => Some(AtomicFile::create(&p.to_string_lossy())?),
            None => None,
        };
        Ok(Rejected { file, shown: 0 })
    }

    /// Records one rejected line.
    pub fn write(&mut self, line: u64, r: &Rejection) -> Result<()> {
        let rec = serde_json::json!({ "line": line, "reason": r.reason.code(), "detail": r.detail });
        match self.file.as_mut() {
            Some(f) => {
                serde_json::to_writer(&mut *f, &rec)?;
                f.write_all(b"\n")?;
            }
            None => {
                self.shown += 1;
                if self.shown <= Self::STDERR_LIMIT {
                    eprintln!("rejected: line {line}: {}: {}", r.reason.code(), r.detail);
                } else if self.shown == Self::STDERR_LIMIT + 1 {
                    eprintln!("rejected: more lines rejected; use --rejected FILE to keep them all");
                }
            }
        }
        Ok(())
    }

    /// Finishes the file.
    pub fn finish(self) -> Result<()> {
        if let Some(f) = self.file {
            f.commit()?;
        }
        Ok(())
    }
}
