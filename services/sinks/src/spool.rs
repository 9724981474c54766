//! Batches kept on disk while their sink is unavailable (see
//! [`crate::layers::Spooled`]).
//!
//! One NDJSON file per batch, `batch-<n>.ndjson`, numbered in order. The
//! first line is `{"apportion_spool":1}` (format version); then one line per
//! row, `{"credit":{...}}` or `{"path":{...}}`. A credit row's two floats are
//! repeated as IEEE 754 bits (`credit_bits`, `value_bits`), because JSON
//! text read back may differ in the last bit. Files are written with
//! [`crate::atomic::AtomicFile`] (temporary name, fsync, rename, directory
//! fsync); leftover temporary files belong to writes that never returned
//! (their batch did not commit and is re-delivered) and are deleted on open.

use std::io::Write;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::atomic::AtomicFile;
use crate::{CreditRow, OutputBatch, PathRow, SinkError};

/// A directory of spooled batches for one sink.
pub struct Spool {
    dir: PathBuf,
    next: u64,
    sink: &'static str,
}

/// Format version of spool files.
const SPOOL_VERSION: u32 = 1;

#[derive(Serialize, Deserialize)]
struct SpoolHeader {
    apportion_spool: u32,
}

#[derive(Serialize)]
#[serde(rename_all = "snake_case")]
enum SpoolLineOut<'a> {
    Credit { row: &'a CreditRow, credit_bits: u64, value_bits: Option<u64> },
    Path { row: &'a PathRow },
}

#[derive(Deserialize)]
#[serde(rename_all = "snake_case", deny_unknown_fields)]
enum SpoolLineIn {
    Credit { row: CreditRow, credit_bits: u64, value_bits: Option<u64> },
    Path { row: PathRow },
}

fn spool_name(n: u64) -> String {
    format!("batch-{n:012}.ndjson")
}

fn parse_spool_name(name: &str) -> Option<u64> {
    name.strip_prefix("batch-")?.strip_suffix(".ndjson")?.parse().ok()
}

impl Spool {
    /// Opens the spool of `sink` in `dir` (created at the first batch).
    pub fn open(dir: PathBuf, sink: &'static str) -> std::io::Result<Spool> {
        let mut next = 1;
        if dir.is_dir() {
            for e in std::fs::read_dir(&dir)? {
                let name = e?.file_name().to_string_lossy().into_owned();
                if name.starts_with(".batch-") && name.ends_with(".tmp") {
                    std::fs::remove_file(dir.join(&name))?;
                } else if let Some(n) = parse_spool_name(&name) {
                    next = next.max(n + 1);
                }
            }
        }
        Ok(Spool { dir, next, sink })
    }

    /// The spool directory.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// Spooled batch files, oldest first.
    pub fn files(&self) -> std::io::Result<Vec<PathBuf>> {
        if !self.dir.is_dir() {
            return Ok(Vec::new());
        }
        let mut files: Vec<(u64, PathBuf)> = Vec::new();
        for e in std::fs::read_dir(&self.dir)? {
            let e = e?;
            if let Some(n) = parse_spool_name(&e.file_name().to_string_lossy()) {
                files.push((n, e.path()));
            }
        }
        files.sort();
        Ok(files.into_iter().map(|(_, p)| p).collect())
    }

    /// Writes `batch`'s credit and path rows as the next spool file; durable on return.
    pub fn push(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        let sink = self.sink;
        let err = |e: std::io::Error| SinkError::retry(sink, format!("cannot write the spool: {e}"));
        let mut w = AtomicFile::create(&self.dir.join(spool_name(self.next))).map_err(err)?;
        fn line<T: Serialize>(w: &mut impl Write, v: &T) -> std::io::Result<()> {
            serde_json::to_writer(&mut *w, v).map_err(std::io::Error::other)?;
            w.write_all(b"\n")
        }
        line(&mut w, &SpoolHeader { apportion_spool: SPOOL_VERSION }).map_err(err)?;
        for r in &batch.credit {
            let l = SpoolLineOut::Credit {
                row: r,
                credit_bits: r.credit.to_bits(),
                value_bits: r.credited_value.map(f64::to_bits),
            };
            line(&mut w, &l).map_err(err)?;
        }
        for r in &batch.paths {
            line(&mut w, &SpoolLineOut::Path { row: r }).map_err(err)?;
        }
        w.commit().map_err(err)?;
        self.next += 1;
        Ok(())
    }

    /// Reads one spool file back. A file that cannot be parsed is a
    /// permanent error naming it (move it away to go on).
    pub fn read(&self, path: &Path) -> Result<OutputBatch, SinkError> {
        let sink = self.sink;
        let text = std::fs::read_to_string(path)
            .map_err(|e| SinkError::retry(sink, format!("cannot read spool file {}: {e}", path.display())))?;
        let bad = |what: String| SinkError::fatal(sink, format!("spool file {} is damaged: {what}", path.display()));
        let mut lines = text.lines();
        let header: SpoolHeader =
            serde_json::from_str(lines.next().unwrap_or_default()).map_err(|e| bad(format!("header: {e}")))?;
        if header.apportion_spool != SPOOL_VERSION {
            return Err(bad(format!("unknown format version {}", header.apportion_spool)));
        }
        let mut batch = OutputBatch::default();
        for (i, l) in lines.enumerate() {
            match serde_json::from_str::<SpoolLineIn>(l).map_err(|e| bad(format!("line {}: {e}", i + 2)))? {
                SpoolLineIn::Credit { mut row, credit_bits, value_bits } => {
                    row.credit = f64::from_bits(credit_bits);
                    row.credited_value = value_bits.map(f64::from_bits);
                    batch.credit.push(row);
                }
                SpoolLineIn::Path { row } => batch.paths.push(row),
            }
        }
        Ok(batch)
    }

    /// Deletes a delivered spool file.
    pub fn remove(&self, path: &Path) -> Result<(), SinkError> {
        std::fs::remove_file(path).map_err(|e| {
            SinkError::retry(self.sink, format!("cannot remove delivered spool file {}: {e}", path.display()))
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use apportion_contract::{Interaction, ModelId, Timestamp, UserKey};

    fn credit_row(id: &str, credit: f64, value: Option<f64>) -> CreditRow {
        CreditRow {
            credit_id: id.into(),
            conversion_id: "c1".into(),
            user_key: UserKey([0xab; 32]),
            model: ModelId::Linear,
            model_version: None,
            goal: "purchase".into(),
            touch_event_id: Some("t1".into()),
            channel: "email".into(),
            campaign: None,
            interaction: Some(Interaction::Click),
            position: 1,
            path_length: 3,
            touch_timestamp: Some(Timestamp(1_780_308_000_000)),
            conversion_timestamp: Timestamp(1_780_311_600_000),
            credit,
            credited_value: value,
            currency: Some("EUR".into()),
        }
    }

    /// Spooled batches come back exactly (floats bit for bit), oldest
    /// first; numbering continues after a restart; an unfinished write is
    /// dropped on open.
    #[test]
    fn spool_round_trip() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("spool");
        let third = 1.0 / 3.0;
        let b1 = OutputBatch {
            credit: vec![credit_row("a", third, Some(third * 129.5)), credit_row("b", 0.1 + 0.2, None)],
            paths: vec![PathRow {
                path_id: "c:c1".into(),
                user_key: UserKey([0xab; 32]),
                converted: true,
                conversion_id: Some("c1".into()),
                goal: Some("purchase".into()),
                channels: vec!["email".into(), "social".into(), "email".into()],
                touch_count: 3,
                first_touch_timestamp: Timestamp(1_780_304_400_000),
                last_touch_timestamp: Timestamp(1_780_308_000_000),
            }],
            dead_letters: vec![],
            erasures: vec![],
        };
        let b2 = OutputBatch { credit: vec![credit_row("c", f64::MIN_POSITIVE, Some(0.0))], ..Default::default() };
        let mut s = Spool::open(path.clone(), "postgres").unwrap();
        assert!(s.files().unwrap().is_empty());
        s.push(&b1).unwrap();
        std::fs::write(path.join(".batch-000000000099.ndjson.tmp"), "half a line").unwrap();
        let mut s = Spool::open(path.clone(), "postgres").unwrap();
        assert!(!path.join(".batch-000000000099.ndjson.tmp").exists());
        s.push(&b2).unwrap();
        let files = s.files().unwrap();
        let names: Vec<_> = files.iter().map(|f| f.file_name().unwrap().to_string_lossy().into_owned()).collect();
        assert_eq!(names, ["batch-000000000001.ndjson", "batch-000000000002.ndjson"]);
        assert_eq!(s.read(&files[0]).unwrap(), b1);
        assert_eq!(s.read(&files[1]).unwrap(), b2);
        s.remove(&files[0]).unwrap();
        assert_eq!(s.files().unwrap(), files[1..]);
    }

    #[test]
    fn damaged_spool_file_is_a_permanent_error() {
        let dir = tempfile::tempdir().unwrap();
        let s = Spool::open(dir.path().to_path_buf(), "postgres").unwrap();
        let f = dir.path().join("batch-000000000001.ndjson");
        std::fs::write(&f, "{\"apportion_spool\":2}\n").unwrap();
        let e = s.read(&f).unwrap_err();
        assert!(!e.retryable && e.detail.contains("format version 2"), "{e}");
        std::fs::write(&f, "{\"apportion_spool\":1}\n{\"credit\":{\"row\":{}}}\n").unwrap();
        let e = s.read(&f).unwrap_err();
        assert!(!e.retryable && e.detail.contains("line 2"), "{e}");
    }
}
