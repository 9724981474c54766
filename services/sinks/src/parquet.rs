//! Parquet files partitioned by date, for warehouses and lakes.
//!
//! ```text
//! <dir>/credit/date=YYYY-MM-DD/part-<first>-<last>.parquet   UTC date of conversion_timestamp
//! <dir>/paths/date=YYYY-MM-DD/part-<first>-<last>.parquet    UTC date of last_touch_timestamp
//! <dir>/_staging/{credit,paths}/date=YYYY-MM-DD/seg-<n>.parquet
//! ```
//!
//! Readers glob `<dir>/credit/*/*.parquet` (hive partitioning gives them a
//! `date` column); they never see the staging area, and never half a file.
//!
//! ## Durability and file size: segments, then a roll
//!
//! A Parquet file is readable only once its footer is written, so a file can
//! not stay open across batches and still hold durable rows: after a crash
//! the footer is missing and every row in it is lost, while the service has
//! already committed the input offsets of those rows. A file per batch would
//! be durable but leaves thousands of tiny files a day for every reader to
//! open. This sink does both, in two steps:
//!
//! 1. `write()` writes each date partition of the batch as one complete
//!    *segment* file in the staging area: written under a `.seg-<n>.parquet.tmp`
//!    name, fsynced, renamed, directory fsynced. When `write()` returns, every
//!    row of the batch is durable on disk, so committing offsets after it is
//!    safe (at least once).
//! 2. A partition *rolls* once its staged segments reach `roll_bytes` (sum of
//!    segment file sizes, so roughly the size of the final file) or its first
//!    staged segment is older than `roll_after`: its segments are copied into
//!    one `part-<first>-<last>.parquet` (written as `.part-…parquet.tmp`,
//!    fsynced, renamed, fsynced), and only then are the segments deleted.
//!    `close()` rolls everything. Rolls happen inside `write()` (an empty
//!    batch is enough to roll partitions whose time is up) and `close()`;
//!    there is no background thread.
//!
//! The price is that rows become visible to readers only at the roll (at
//! most about `roll_after` later, while batches keep coming) and that every
//! row is written twice. The final name carries the segment range it
//! covers, so recovery is exact: `open()` deletes leftover `.tmp` files (a
//! crashed write was never acknowledged, a crashed roll still has its
//! segments), deletes segments that a `part-` file already covers (a crash
//! between the rename and the deletion), and rolls the remaining segments.
//! Segment numbers continue after the largest number found, per table.
//!
//! A batch that fails half way is retried by the service as a whole, so its
//! rows may appear twice; rows carry a deterministic `credit_id` / `path_id`
//! and readers deduplicate on it, as for every sink. Compacting old
//! partitions (many small `part-` files from late events) is not done here.
//!
//! Dead letters are not written by this sink (the file and Kafka sinks keep
//! them).
//!
//! ## Columns
//!
//! One column per contract field (docs/contract.md, "Credit rows" and "Path rows"): strings as
//! UTF-8, nullable where the contract allows null, `position`,
//! `path_length` and `touch_count` as INT32 (as in
//! `deploy/warehouse/postgres.sql`), `credit` and `credited_value` as
//! DOUBLE, timestamps as `TIMESTAMP(MILLIS, isAdjustedToUTC=true)`, the
//! channels of a path as `LIST<STRING>`. Snappy compression; the file
//! metadata holds `apportion.table` and `apportion.format_version`.

use std::collections::BTreeMap;
use std::fs::File;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use apportion_contract::time::date_of_ms;
use apportion_contract::{CreditRow, PathRow, Period};
use arrow_array::builder::{ListBuilder, StringBuilder};
use arrow_array::{
    ArrayRef, BooleanArray, Float64Array, Int32Array, RecordBatch, StringArray, TimestampMillisecondArray,
};
use arrow_schema::{DataType, Field, Schema, SchemaRef, TimeUnit};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use parquet::arrow::ArrowWriter;
use parquet::basic::Compression;
use parquet::file::metadata::KeyValue;
use parquet::file::properties::WriterProperties;

use serde::{Deserialize, Serialize};

use crate::atomic::{sync_dir as fsync_dir, AtomicFile};
use crate::{OutputBatch, Sink, SinkError};

const SINK: &str = "parquet";
/// Version of the column layout, stored in each file's metadata.
pub const FORMAT_VERSION: &str = "1";
/// Name of the staging directory under the sink directory.
pub const STAGING_DIR: &str = "_staging";
/// Rows per row group (a roll of many segments is split into row groups of this size).
const ROW_GROUP_ROWS: usize = 128 * 1024;

/// Arrow schema of the credit files.
pub fn credit_schema() -> SchemaRef {
    let ts = DataType::Timestamp(TimeUnit::Millisecond, Some("UTC".into()));
    Arc::new(Schema::new(vec![
        Field::new("credit_id", DataType::Utf8, false),
        Field::new("conversion_id", DataType::Utf8, false),
        Field::new("user_key", DataType::Utf8, false),
        Field::new("model", DataType::Utf8, false),
        Field::new("model_version", DataType::Utf8, true),
        Field::new("goal", DataType::Utf8, false),
        Field::new("touch_event_id", DataType::Utf8, true),
        Field::new("channel", DataType::Utf8, false),
        Field::new("campaign", DataType::Utf8, true),
        Field::new("interaction", DataType::Utf8, true),
        Field::new("position", DataType::Int32, false),
        Field::new("path_length", DataType::Int32, false),
        Field::new("touch_timestamp", ts.clone(), true),
        Field::new("conversion_timestamp", ts, false),
        Field::new("credit", DataType::Float64, false),
        Field::new("credited_value", DataType::Float64, true),
        Field::new("currency", DataType::Utf8, true),
    ]))
}

/// Arrow schema of the path files.
pub fn paths_schema() -> SchemaRef {
    let ts = DataType::Timestamp(TimeUnit::Millisecond, Some("UTC".into()));
    Arc::new(Schema::new(vec![
        Field::new("path_id", DataType::Utf8, false),
        Field::new("user_key", DataType::Utf8, false),
        Field::new("converted", DataType::Boolean, false),
        Field::new("conversion_id", DataType::Utf8, true),
        Field::new("goal", DataType::Utf8, true),
        Field::new("channels", DataType::List(Arc::new(channel_item())), false),
        Field::new("touch_count", DataType::Int32, false),
        Field::new("first_touch_timestamp", ts.clone(), false),
        Field::new("last_touch_timestamp", ts, false),
    ]))
}

fn channel_item() -> Field {
    Field::new("item", DataType::Utf8, false)
}

/// Whether a partition with `staged_bytes` in segments, the oldest staged
/// `age` ago, should roll now.
pub fn roll_due(staged_bytes: u64, age: Duration, roll_bytes: u64, roll_after: Duration) -> bool {
    staged_bytes >= roll_bytes || age >= roll_after
}

fn int32(field: &str, v: u32) -> Result<i32, SinkError> {
    i32::try_from(v).map_err(|_| SinkError::fatal(SINK, format!("{field} {v} does not fit INT32")))
}

/// Credit rows as one record batch of [`credit_schema`].
pub fn credit_batch(rows: &[&CreditRow]) -> Result<RecordBatch, SinkError> {
    let s =
        |f: fn(&CreditRow) -> &str| -> ArrayRef { Arc::new(rows.iter().map(|r| Some(f(r))).collect::<StringArray>()) };
    let o = |f: fn(&CreditRow) -> Option<&str>| -> ArrayRef {
        Arc::new(rows.iter().map(|r| f(r)).collect::<StringArray>())
    };
    let mut position = Vec::with_capacity(rows.len());
    let mut path_length = Vec::with_capacity(rows.len());
    let mut touch_ts = Vec::with_capacity(rows.len());
    let mut conv_ts = Vec::with_capacity(rows.len());
    for r in rows {
        position.push(int32("position", r.position)?);
        path_length.push(int32("path_length", r.path_length)?);
        touch_ts.push(r.touch_timestamp.map(|t| t.ms()));
        conv_ts.push(r.conversion_timestamp.ms());
    }
    let columns: Vec<ArrayRef> = vec![
        s(|r| &r.credit_id),
        s(|r| &r.conversion_id),
        Arc::new(rows.iter().map(|r| Some(r.user_key.to_hex())).collect::<StringArray>()),
        s(|r| r.model.as_str()),
        o(|r| r.model_version.as_deref()),
        s(|r| &r.goal),
        o(|r| r.touch_event_id.as_deref()),
        s(|r| &r.channel),
        o(|r| r.campaign.as_deref()),
        o(|r| r.interaction.map(|i| i.as_str())),
        Arc::new(Int32Array::from(position)),
        Arc::new(Int32Array::from(path_length)),
        Arc::new(TimestampMillisecondArray::from(touch_ts).with_timezone("UTC")),
        Arc::new(TimestampMillisecondArray::from(conv_ts).with_timezone("UTC")),
        Arc::new(rows.iter().map(|r| r.credit).collect::<Float64Array>()),
        Arc::new(rows.iter().map(|r| r.credited_value).collect::<Float64Array>()),
        o(|r| r.currency.as_deref()),
    ];
    RecordBatch::try_new(credit_schema(), columns).map_err(|e| SinkError::fatal(SINK, format!("credit batch: {e}")))
}

/// Path rows as one record batch of [`paths_schema`].
pub fn paths_batch(rows: &[&PathRow]) -> Result<RecordBatch, SinkError> {
    let mut channels = ListBuilder::new(StringBuilder::new()).with_field(channel_item());
    let mut touch_count = Vec::with_capacity(rows.len());
    let mut first = Vec::with_capacity(rows.len());
    let mut last = Vec::with_capacity(rows.len());
    for r in rows {
        for c in &r.channels {
            channels.values().append_value(c);
        }
        channels.append(true);
        touch_count.push(int32("touch_count", r.touch_count)?);
        first.push(r.first_touch_timestamp.ms());
        last.push(r.last_touch_timestamp.ms());
    }
    let columns: Vec<ArrayRef> = vec![
        Arc::new(rows.iter().map(|r| Some(r.path_id.as_str())).collect::<StringArray>()),
        Arc::new(rows.iter().map(|r| Some(r.user_key.to_hex())).collect::<StringArray>()),
        Arc::new(rows.iter().map(|r| Some(r.converted)).collect::<BooleanArray>()),
        Arc::new(rows.iter().map(|r| r.conversion_id.as_deref()).collect::<StringArray>()),
        Arc::new(rows.iter().map(|r| r.goal.as_deref()).collect::<StringArray>()),
        Arc::new(channels.finish()),
        Arc::new(Int32Array::from(touch_count)),
        Arc::new(TimestampMillisecondArray::from(first).with_timezone("UTC")),
        Arc::new(TimestampMillisecondArray::from(last).with_timezone("UTC")),
    ];
    RecordBatch::try_new(paths_schema(), columns).map_err(|e| SinkError::fatal(SINK, format!("paths batch: {e}")))
}

/// The UTC date partition of a credit row (by `conversion_timestamp`).
fn credit_date(r: &CreditRow) -> Result<String, SinkError> {
    Ok(date_of_ms(r.conversion_timestamp.ms()))
}

/// The UTC date partition of a path row (by `last_touch_timestamp`).
fn path_date(r: &PathRow) -> Result<String, SinkError> {
    Ok(date_of_ms(r.last_touch_timestamp.ms()))
}

fn io_retry(what: &str, path: &Path) -> impl Fn(std::io::Error) -> SinkError {
    let ctx = format!("{what} {}", path.display());
    move |e| SinkError::retry(SINK, format!("{ctx}: {e}"))
}

fn pq_retry(what: &str, path: &Path) -> impl Fn(parquet::errors::ParquetError) -> SinkError {
    let ctx = format!("{what} {}", path.display());
    move |e| SinkError::retry(SINK, format!("{ctx}: {e}"))
}

fn sync_dir(dir: &Path) -> Result<(), SinkError> {
    fsync_dir(dir).map_err(io_retry("fsync directory", dir))
}

/// Creates `dir` (and parents) if missing, fsyncing each parent that got a new entry.
fn ensure_dir(dir: &Path) -> Result<(), SinkError> {
    // The parent of a bare relative name is "": the working directory.
    if dir.as_os_str().is_empty() || dir.is_dir() {
        return Ok(());
    }
    if let Some(parent) = dir.parent() {
        ensure_dir(parent)?;
    }
    match std::fs::create_dir(dir) {
        Ok(()) => {}
        Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => return Ok(()),
        Err(e) => return Err(io_retry("create directory", dir)(e)),
    }
    match dir.parent() {
        Some(p) if !p.as_os_str().is_empty() => sync_dir(p)?,
        _ => sync_dir(Path::new("."))?,
    }
    Ok(())
}

/// Writes `batches` as one complete Parquet file at `dest`, atomically
/// ([`AtomicFile`]: `.<name>.tmp` beside it, fsync, rename, fsync the
/// directory). Returns the file size.
fn write_file_atomic(
    dest: &Path,
    schema: &SchemaRef,
    table: &str,
    batches: impl IntoIterator<Item = Result<RecordBatch, SinkError>>,
) -> Result<u64, SinkError> {
    let props = WriterProperties::builder()
        .set_compression(Compression::SNAPPY)
        .set_max_row_group_row_count(Some(ROW_GROUP_ROWS))
        .set_key_value_metadata(Some(vec![
            KeyValue::new("apportion.table".to_string(), table.to_string()),
            KeyValue::new("apportion.format_version".to_string(), FORMAT_VERSION.to_string()),
        ]))
        .build();
    let file = AtomicFile::create(dest).map_err(io_retry("create", dest))?;
    let mut w = ArrowWriter::try_new(file, schema.clone(), Some(props)).map_err(pq_retry("open writer", dest))?;
    for b in batches {
        w.write(&b?).map_err(pq_retry("write", dest))?;
    }
    let file = w.into_inner().map_err(pq_retry("finish", dest))?;
    file.commit().map_err(io_retry("commit", dest))
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Kind {
    Credit,
    Paths,
}

impl Kind {
    fn name(self) -> &'static str {
        match self {
            Kind::Credit => "credit",
            Kind::Paths => "paths",
        }
    }
    fn schema(self) -> SchemaRef {
        match self {
            Kind::Credit => credit_schema(),
            Kind::Paths => paths_schema(),
        }
    }
}

/// Staged segments of one date partition.
#[derive(Debug)]
struct Staged {
    /// (segment number, file size), ascending.
    segments: Vec<(u64, u64)>,
    /// When the first of them was staged (or found at open).
    since: Instant,
}

/// One table (`credit` or `paths`): its final tree, its staging tree and
/// the segments not rolled yet.
#[derive(Debug)]
struct Table {
    kind: Kind,
    schema: SchemaRef,
    root: PathBuf,
    staging: PathBuf,
    seq: u64,
    staged: BTreeMap<String, Staged>,
}

fn seg_name(n: u64) -> String {
    format!("seg-{n:010}.parquet")
}

fn part_name(first: u64, last: u64) -> String {
    format!("part-{first:010}-{last:010}.parquet")
}

fn parse_seg(name: &str) -> Option<u64> {
    name.strip_prefix("seg-")?.strip_suffix(".parquet")?.parse().ok()
}

fn parse_part(name: &str) -> Option<(u64, u64)> {
    let (a, b) = name.strip_prefix("part-")?.strip_suffix(".parquet")?.split_once('-')?;
    Some((a.parse().ok()?, b.parse().ok()?))
}

/// `date=YYYY-MM-DD` directories under `root`, with their date.
fn partitions(root: &Path) -> std::io::Result<Vec<(String, PathBuf)>> {
    let mut out = Vec::new();
    if !root.is_dir() {
        return Ok(out);
    }
    for e in std::fs::read_dir(root)? {
        let e = e?;
        let name = e.file_name().to_string_lossy().into_owned();
        if let Some(date) = name.strip_prefix("date=") {
            if e.file_type()?.is_dir() {
                out.push((date.to_string(), e.path()));
            }
        }
    }
    out.sort();
    Ok(out)
}

fn file_names(dir: &Path) -> std::io::Result<Vec<String>> {
    let mut out = Vec::new();
    for e in std::fs::read_dir(dir)? {
        out.push(e?.file_name().to_string_lossy().into_owned());
    }
    out.sort();
    Ok(out)
}

impl Table {
    /// Scans the trees: removes leftovers of a crash and collects the
    /// segments still to roll.
    fn open(dir: &Path, kind: Kind) -> Result<Self, SinkError> {
        let root = dir.join(kind.name());
        let staging = dir.join(STAGING_DIR).join(kind.name());
        ensure_dir(&root)?;
        ensure_dir(&staging)?;
        let scan = |p: &Path| io_retry("scan", p);
        let mut seq = 0u64;
        let mut covered: BTreeMap<String, Vec<(u64, u64)>> = BTreeMap::new();
        for (date, pdir) in partitions(&root).map_err(scan(&root))? {
            for name in file_names(&pdir).map_err(scan(&pdir))? {
                if name.starts_with('.') && name.ends_with(".tmp") {
                    // A roll that crashed before its rename: its segments are still staged.
                    let p = pdir.join(&name);
                    std::fs::remove_file(&p).map_err(io_retry("remove", &p))?;
                } else if let Some((a, b)) = parse_part(&name) {
                    seq = seq.max(b);
                    covered.entry(date.clone()).or_default().push((a, b));
                }
            }
        }
        let now = Instant::now();
        let mut staged = BTreeMap::new();
        for (date, sdir) in partitions(&staging).map_err(scan(&staging))? {
            let mut segments = Vec::new();
            for name in file_names(&sdir).map_err(scan(&sdir))? {
                let p = sdir.join(&name);
                if name.starts_with('.') && name.ends_with(".tmp") {
                    // A write() that never returned: the batch is re-delivered.
                    std::fs::remove_file(&p).map_err(io_retry("remove", &p))?;
                } else if let Some(n) = parse_seg(&name) {
                    seq = seq.max(n);
                    let done = covered.get(&date).is_some_and(|r| r.iter().any(|&(a, b)| (a..=b).contains(&n)));
                    if done {
                        // Rolled already; the crash came before the segment was deleted.
                        std::fs::remove_file(&p).map_err(io_retry("remove", &p))?;
                    } else {
                        let size = std::fs::metadata(&p).map_err(io_retry("stat", &p))?.len();
                        segments.push((n, size));
                    }
                }
            }
            sync_dir(&sdir)?;
            if !segments.is_empty() {
                segments.sort();
                staged.insert(date, Staged { segments, since: now });
            }
        }
        Ok(Table { kind, schema: kind.schema(), root, staging, seq, staged })
    }

    /// Writes one segment per date partition.
    fn stage(&mut self, by_date: BTreeMap<String, RecordBatch>) -> Result<(), SinkError> {
        for (date, batch) in by_date {
            let sdir = self.staging.join(format!("date={date}"));
            ensure_dir(&sdir)?;
            let n = self.seq + 1;
            let dest = sdir.join(seg_name(n));
            let size = write_file_atomic(&dest, &self.schema, self.kind.name(), [Ok(batch)])?;
            self.seq = n;
            let st = self.staged.entry(date).or_insert_with(|| Staged { segments: Vec::new(), since: Instant::now() });
            st.segments.push((n, size));
        }
        Ok(())
    }

    /// Rolls the partitions that are due (all of them when `all`).
    fn roll(&mut self, roll_bytes: u64, roll_after: Duration, all: bool) -> Result<(), SinkError> {
        let due: Vec<String> = self
            .staged
            .iter()
            .filter(|(_, st)| {
                let bytes = st.segments.iter().map(|s| s.1).sum();
                all || roll_due(bytes, st.since.elapsed(), roll_bytes, roll_after)
            })
            .map(|(d, _)| d.clone())
            .collect();
        for date in due {
            self.roll_one(&date)?;
        }
        Ok(())
    }

    fn roll_one(&mut self, date: &str) -> Result<(), SinkError> {
        let Some(st) = self.staged.get(date) else { return Ok(()) };
        let (first, last) = (st.segments[0].0, st.segments[st.segments.len() - 1].0);
        let sdir = self.staging.join(format!("date={date}"));
        let pdir = self.root.join(format!("date={date}"));
        ensure_dir(&pdir)?;
        let dest = pdir.join(part_name(first, last));
        let schema = self.schema.clone();
        let segs: Vec<PathBuf> = st.segments.iter().map(|(n, _)| sdir.join(seg_name(*n))).collect();
        let batches = segs.iter().flat_map(|p| segment_batches(p, &schema));
        write_file_atomic(&dest, &self.schema, self.kind.name(), batches)?;
        // The part file is in place: the segments are now redundant. A
        // segment that cannot be deleted is covered by the part's range and
        // deleted by the next open(), so failures here are not errors.
        self.staged.remove(date);
        for p in &segs {
            let _ = std::fs::remove_file(p);
        }
        let _ = sync_dir(&sdir);
        let _ = std::fs::remove_dir(&sdir);
        Ok(())
    }
}

/// The record batches of one segment, re-labelled with `schema`.
fn segment_batches(path: &Path, schema: &SchemaRef) -> Vec<Result<RecordBatch, SinkError>> {
    let read = || -> Result<Vec<RecordBatch>, SinkError> {
        let f = File::open(path).map_err(io_retry("open", path))?;
        let reader = ParquetRecordBatchReaderBuilder::try_new(f)
            .and_then(|b| b.build())
            .map_err(pq_retry("read segment", path))?;
        let mut out = Vec::new();
        for b in reader {
            let b = b.map_err(|e| SinkError::retry(SINK, format!("read segment {}: {e}", path.display())))?;
            let b = RecordBatch::try_new(schema.clone(), b.columns().to_vec())
                .map_err(|e| SinkError::fatal(SINK, format!("segment {} has another schema: {e}", path.display())))?;
            out.push(b);
        }
        Ok(out)
    };
    match read() {
        Ok(v) => v.into_iter().map(Ok).collect(),
        Err(e) => vec![Err(e)],
    }
}

/// Date-partitioned Parquet output (see the module docs).
#[derive(Debug)]
pub struct ParquetSink {
    roll_bytes: u64,
    roll_after: Duration,
    credit: Table,
    paths: Table,
}

impl ParquetSink {
    /// Opens (or creates) the sink in `dir`. Partitions roll into a
    /// `part-` file once their staged segments reach `roll_bytes` or the
    /// oldest is `roll_after` old. Leftovers of a crash are cleaned up and
    /// staged segments found here are rolled at once.
    pub fn open(dir: &Path, roll_bytes: u64, roll_after: Duration) -> Result<Self, SinkError> {
        let fatal = |e: SinkError| SinkError::fatal(SINK, e.detail);
        ensure_dir(dir).map_err(fatal)?;
        let mut sink = ParquetSink {
            roll_bytes,
            roll_after,
            credit: Table::open(dir, Kind::Credit).map_err(fatal)?,
            paths: Table::open(dir, Kind::Paths).map_err(fatal)?,
        };
        sink.credit.roll(roll_bytes, roll_after, true).map_err(fatal)?;
        sink.paths.roll(roll_bytes, roll_after, true).map_err(fatal)?;
        Ok(sink)
    }

    /// Number of date partitions with segments not rolled yet.
    pub fn staged_partitions(&self) -> usize {
        self.credit.staged.len() + self.paths.staged.len()
    }
}

fn group<'a, T>(
    rows: &'a [T],
    date: impl Fn(&T) -> Result<String, SinkError>,
    build: impl Fn(&[&T]) -> Result<RecordBatch, SinkError>,
) -> Result<BTreeMap<String, RecordBatch>, SinkError> {
    let mut by_date: BTreeMap<String, Vec<&'a T>> = BTreeMap::new();
    for r in rows {
        by_date.entry(date(r)?).or_default().push(r);
    }
    by_date.into_iter().map(|(d, rows)| Ok((d, build(&rows)?))).collect()
}

impl Sink for ParquetSink {
    fn name(&self) -> &'static str {
        SINK
    }

    fn write(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        // Build every record batch first: a bad row fails the batch before
        // anything is written.
        let credit = group(&batch.credit, credit_date, credit_batch)?;
        let paths = group(&batch.paths, path_date, paths_batch)?;
        self.credit.stage(credit)?;
        self.paths.stage(paths)?;
        self.credit.roll(self.roll_bytes, self.roll_after, false)?;
        self.paths.roll(self.roll_bytes, self.roll_after, false)?;
        Ok(())
    }

    fn close(&mut self) -> Result<(), SinkError> {
        self.credit.roll(self.roll_bytes, self.roll_after, true)?;
        self.paths.roll(self.roll_bytes, self.roll_after, true)?;
        Ok(())
    }

    fn keeps_dead_letters(&self) -> bool {
        false
    }
}

/// The `[parquet]` section.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct ParquetConfig {
    /// Directory of the `credit/` and `paths/` trees.
    pub dir: String,
    /// Roll a date partition's staged segments into one file at this many bytes.
    pub roll_bytes: u64,
    /// ... or when its oldest staged segment is this old.
    pub roll_after: Period,
}

impl Default for ParquetConfig {
    fn default() -> Self {
        ParquetConfig { dir: "apportion-parquet".into(), roll_bytes: 128 << 20, roll_after: Period(15 * 60_000) }
    }
}

impl ParquetConfig {
    /// Checks what types alone do not.
    pub fn validate(&self) -> Result<(), String> {
        if self.dir.trim().is_empty() {
            return Err(
                "parquet.dir is empty: set it (or APPORTION_PARQUET_DIR), or remove the [parquet] section".into()
            );
        }
        if self.roll_after.ms() < 0 {
            return Err("parquet.roll_after must not be negative".into());
        }
        Ok(())
    }

    /// Opens the sink.
    pub fn build(&self) -> Result<ParquetSink, SinkError> {
        let sink = ParquetSink::open(Path::new(&self.dir), self.roll_bytes, self.roll_after.to_std())?;
        tracing::info!(dir = %self.dir, "Parquet sink open");
        Ok(sink)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_round_trip() {
        assert_eq!(parse_seg(&seg_name(42)), Some(42));
        assert_eq!(parse_part(&part_name(3, 17)), Some((3, 17)));
        assert_eq!(parse_seg(".seg-0000000001.parquet.tmp"), None);
        assert_eq!(parse_part(".part-0000000001-0000000002.parquet.tmp"), None);
    }

    /// A relative directory, including a bare name whose parent is "".
    /// (Changes the working directory: the only test here that touches files.)
    #[test]
    fn roll_rule() {
        let min = Duration::from_secs(60);
        assert!(!roll_due(10, Duration::from_secs(1), 100, min));
        assert!(roll_due(100, Duration::from_secs(1), 100, min));
        assert!(roll_due(10, min, 100, min));
        assert!(roll_due(0, Duration::ZERO, 0, min));
    }
}
