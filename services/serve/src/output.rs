//! Output files of `replay` and `explain`: written atomically (the sinks'
//! [`apportion_sinks::atomic::AtomicFile`]), so a reader never sees half a
//! file; `-` means stdout.

use std::io::{BufWriter, Write};
use std::path::Path;

use anyhow::{Context, Result};
use apportion_contract::Rejection;
use apportion_sinks::atomic::AtomicFile;

/// A file written atomically, or stdout.
pub enum OutputFile {
    /// Standard output.
    Stdout(BufWriter<std::io::Stdout>),
    /// A file, moved into place by [`OutputFile::commit`].
    File(AtomicFile),
}

impl OutputFile {
    /// Creates the writer; `-` is stdout.
    pub fn create(path: &str) -> Result<OutputFile> {
        if path == "-" {
            return Ok(OutputFile::Stdout(BufWriter::with_capacity(1 << 20, std::io::stdout())));
        }
        let f = AtomicFile::create(Path::new(path)).with_context(|| format!("cannot create output {path}"))?;
        Ok(OutputFile::File(f))
    }

    /// Flushes and moves the file into place.
    pub fn commit(self) -> Result<()> {
        match self {
            OutputFile::Stdout(mut w) => w.flush().context("writing output")?,
            OutputFile::File(f) => {
                let target = f.target().to_path_buf();
                f.commit().with_context(|| format!("cannot move output into place at {}", target.display()))?;
            }
        }
        Ok(())
    }
}

impl Write for OutputFile {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        match self {
            OutputFile::Stdout(w) => w.write(buf),
            OutputFile::File(f) => f.write(buf),
        }
    }
    fn flush(&mut self) -> std::io::Result<()> {
        match self {
            OutputFile::Stdout(w) => w.flush(),
            OutputFile::File(f) => f.flush(),
        }
    }
}

/// The rejected-lines output: one JSON object per rejected line with its
/// line number, reason code and detail (never the line itself, which may
/// hold a raw user id). Without a file, the first few go to stderr.
pub struct Rejected {
    file: Option<OutputFile>,
    shown: u64,
}

impl Rejected {
    const STDERR_LIMIT: u64 = 20;

    /// Opens the rejected file, if any.
    pub fn open(path: Option<&Path>) -> Result<Rejected> {
        let file = match path {
            Some(p) => Some(OutputFile::create(&p.to_string_lossy())?),
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
