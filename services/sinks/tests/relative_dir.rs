//! The Parquet sink under a relative directory name (as a service started
//! in its working directory with `dir = "out"` has it). The test changes the
//! working directory, so it lives alone in this test binary (its own
//! process) and cannot disturb other tests.

use std::path::Path;
use std::time::Duration;

use apportion_sinks::parquet::{ParquetSink, STAGING_DIR};
use apportion_sinks::{OutputBatch, Sink};

#[test]
fn relative_directory() {
    let tmp = tempfile::tempdir().unwrap();
    std::env::set_current_dir(tmp.path()).unwrap();
    for d in ["bare", "nested/deeper"] {
        let mut s = ParquetSink::open(Path::new(d), 0, Duration::ZERO).unwrap();
        s.write(&OutputBatch::default()).unwrap();
        s.close().unwrap();
        assert!(Path::new(d).join("credit").is_dir() && Path::new(d).join(STAGING_DIR).is_dir());
    }
}
