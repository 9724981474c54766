//! The one way a file is made durable and visible at once: written under a
//! temporary name in its final directory, fsynced, renamed, and the
//! directory fsynced (a rename is durable only once its directory is).
//! Readers that ignore the temporary names never see half a file.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

/// Fsyncs a directory, so that renames and creations in it are durable.
pub fn sync_dir(dir: &Path) -> std::io::Result<()> {
    File::open(dir)?.sync_all()
}

/// The directory a path lives in (`.` for a bare name).
pub fn parent_dir(path: &Path) -> &Path {
    path.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(Path::new("."))
}

/// A file being written under a temporary name (`.<name>.tmp` beside its
/// final place); [`AtomicFile::commit`] makes it durable and moves it into
/// place. Dropped without commit, the temporary file is removed.
pub struct AtomicFile {
    writer: Option<BufWriter<File>>,
    tmp: PathBuf,
    target: PathBuf,
}

/// The temporary name of `target`: `.<file name>.tmp` in the same directory.
pub fn temporary_name(target: &Path) -> PathBuf {
    let name = target.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    parent_dir(target).join(format!(".{name}.tmp"))
}

impl AtomicFile {
    /// Starts writing `target` (creating its directory if needed).
    pub fn create(target: &Path) -> std::io::Result<AtomicFile> {
        std::fs::create_dir_all(parent_dir(target))?;
        let tmp = temporary_name(target);
        let f = File::create(&tmp)?;
        Ok(AtomicFile { writer: Some(BufWriter::with_capacity(1 << 20, f)), tmp, target: target.to_path_buf() })
    }

    /// The final path.
    pub fn target(&self) -> &Path {
        &self.target
    }

    /// Flushes, fsyncs, renames into place and fsyncs the directory.
    /// Returns the file's size.
    pub fn commit(mut self) -> std::io::Result<u64> {
        let w = self.writer.take().expect("not committed yet");
        let f = w.into_inner().map_err(|e| e.into_error())?;
        f.sync_all()?;
        let size = f.metadata()?.len();
        drop(f);
        std::fs::rename(&self.tmp, &self.target)?;
        sync_dir(parent_dir(&self.target))?;
        Ok(size)
    }
}

impl Write for AtomicFile {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.writer.as_mut().expect("not committed yet").write(buf)
    }
    fn write_all(&mut self, buf: &[u8]) -> std::io::Result<()> {
        self.writer.as_mut().expect("not committed yet").write_all(buf)
    }
    fn flush(&mut self) -> std::io::Result<()> {
        self.writer.as_mut().expect("not committed yet").flush()
    }
}

impl Drop for AtomicFile {
    fn drop(&mut self) {
        if self.writer.take().is_some() {
            let _ = std::fs::remove_file(&self.tmp);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn visible_only_after_commit() {
        let dir = tempfile::tempdir().unwrap();
        let target = dir.path().join("sub").join("out.txt");
        let mut f = AtomicFile::create(&target).unwrap();
        f.write_all(b"hello\n").unwrap();
        assert!(!target.exists());
        assert!(temporary_name(&target).exists());
        assert_eq!(f.commit().unwrap(), 6);
        assert_eq!(std::fs::read_to_string(&target).unwrap(), "hello\n");
        assert!(!temporary_name(&target).exists());

        let other = dir.path().join("abandoned.txt");
        let mut f = AtomicFile::create(&other).unwrap();
        f.write_all(b"half").unwrap();
        drop(f);
        assert!(!other.exists() && !temporary_name(&other).exists());
    }
}
