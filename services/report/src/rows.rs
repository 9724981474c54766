//! Credit and path rows as this crate reads them, and the readers.
//!
//! Only the fields the comparison needs are read, into this crate's own
//! structs; the field names are those of the output contract (README,
//! "Events in, credit out"). Unknown fields are ignored.
//!
//! ## Where rows come from
//!
//! A PATH given to `--credits` or `--paths` is one of:
//!
//! - a file: `*.parquet` is read as Parquet, anything else as NDJSON (one
//!   row per line, as written by `replay --output` / `--paths`);
//! - a directory of rotated files (the embedded sink's `output_dir`):
//!   `credit-NNNNNN.ndjson` or `paths-NNNNNN.ndjson` in name order; files
//!   still being written (`*.partial`) are ignored;
//! - a Parquet directory: the sink's root (its `credit/` or `paths/`
//!   subdirectory is used), one table's tree of `date=YYYY-MM-DD/`
//!   directories, or any directory of `*.parquet` files. Names starting
//!   with `.` or `_` (temporary files, the sink's `_staging/`) are skipped,
//!   as a warehouse reader globbing `credit/*/*.parquet` would.
//!
//! ## Duplicates
//!
//! Delivery is at least once, so a row can be written twice (README,
//! "serve with Kafka"). Credit rows are identified by (conversion, model,
//! position), which is what the contract's `credit_id` is derived from;
//! the first copy is kept. Path rows are identified by `path_id`.
//!
//! The batch command holds the rows in memory (grouped by conversion); for
//! inputs beyond memory, feed [`crate::Comparison`] from a stream instead.

use std::collections::{HashMap, HashSet};
use std::fs::File;
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};

use apportion_engine::contract::time::{format_ms, parse_rfc3339_ms};
use arrow_array::{
    Array, BooleanArray, Float64Array, Int32Array, ListArray, RecordBatch, StringArray, TimestampMillisecondArray,
};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use parquet::arrow::ProjectionMask;
use serde::{Deserialize, Serialize};

use crate::ReportError;

/// The fields of one credit row that the comparison reads.
#[derive(Debug, Clone, PartialEq)]
pub struct CreditRecord {
    /// The conversion's `event_id`.
    pub conversion_id: String,
    /// Model name.
    pub model: String,
    /// Snapshot id of a data-driven model (its Markov order is read from it).
    pub model_version: Option<String>,
    /// Conversion goal.
    pub goal: String,
    /// Channel of the touch, or `unattributed`.
    pub channel: String,
    /// Campaign of the touch.
    pub campaign: Option<String>,
    /// 1-based position in the path (0 for `unattributed`).
    pub position: u32,
    /// Conversion time, epoch milliseconds.
    pub conversion_ms: i64,
    /// Fraction of the conversion.
    pub credit: f64,
    /// `credit * value` when the conversion has a value.
    pub credited_value: Option<f64>,
    /// ISO 4217 currency of the value.
    pub currency: Option<String>,
}

/// A credit row in the contract's serde form (only the fields read).
#[derive(Debug, Deserialize)]
struct RawCredit {
    conversion_id: String,
    model: String,
    #[serde(default)]
    model_version: Option<String>,
    #[serde(default)]
    goal: Option<String>,
    channel: String,
    #[serde(default)]
    campaign: Option<String>,
    position: u32,
    conversion_timestamp: String,
    credit: f64,
    #[serde(default)]
    credited_value: Option<f64>,
    #[serde(default)]
    currency: Option<String>,
}

impl CreditRecord {
    fn from_raw(r: RawCredit) -> Result<Self, String> {
        let conversion_ms = parse_rfc3339_ms(&r.conversion_timestamp)
            .ok_or_else(|| format!("conversion_timestamp is not an RFC 3339 time: {:?}", r.conversion_timestamp))?;
        let rec = CreditRecord {
            conversion_id: r.conversion_id,
            model: r.model,
            model_version: r.model_version,
            goal: r.goal.unwrap_or_else(|| "conversion".into()),
            channel: r.channel,
            campaign: r.campaign,
            position: r.position,
            conversion_ms,
            credit: r.credit,
            credited_value: r.credited_value,
            currency: r.currency,
        };
        rec.check()?;
        Ok(rec)
    }

    fn check(&self) -> Result<(), String> {
        if !self.credit.is_finite() || self.credit < 0.0 {
            return Err(format!("credit must be a finite number >= 0, got {}", self.credit));
        }
        if let Some(v) = self.credited_value {
            if !v.is_finite() {
                return Err("credited_value must be a finite number".into());
            }
        }
        if self.model.is_empty() || self.conversion_id.is_empty() {
            return Err("model and conversion_id must not be empty".into());
        }
        Ok(())
    }

    /// Parses one NDJSON line of the output contract.
    pub fn from_json(line: &str) -> Result<Self, String> {
        let raw: RawCredit = serde_json::from_str(line).map_err(|e| e.to_string())?;
        Self::from_raw(raw)
    }

    /// Converts any value whose serde form is a contract credit row (for
    /// example the engine's own row type, wherever it lives) by way of its
    /// JSON form. This is how a process that holds rows in memory feeds
    /// [`crate::Comparison`].
    pub fn from_serialized<T: Serialize>(row: &T) -> Result<Self, String> {
        let v = serde_json::to_value(row).map_err(|e| e.to_string())?;
        let raw: RawCredit = serde_json::from_value(v).map_err(|e| e.to_string())?;
        Self::from_raw(raw)
    }

    /// The fields the comparison reads, straight from a typed row of the
    /// contract (the streaming service feeds its rows this way, with no
    /// JSON in between).
    pub fn from_row(r: &apportion_engine::CreditRow) -> Self {
        CreditRecord {
            conversion_id: r.conversion_id.clone(),
            model: r.model.as_str().to_string(),
            model_version: r.model_version.clone(),
            goal: r.goal.clone(),
            channel: r.channel.clone(),
            campaign: r.campaign.clone(),
            position: r.position,
            conversion_ms: r.conversion_timestamp.ms(),
            credit: r.credit,
            credited_value: r.credited_value,
            currency: r.currency.clone(),
        }
    }

    /// The conversion time as RFC 3339 (UTC, milliseconds).
    pub fn conversion_timestamp(&self) -> String {
        format_ms(self.conversion_ms)
    }
}

/// The fields of one closed path that the bootstrap reads.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PathRecord {
    /// Deterministic id (duplicates are dropped by it).
    pub path_id: String,
    /// True when the path ended in a conversion.
    pub converted: bool,
    /// Channels in time order.
    pub channels: Vec<String>,
}

#[derive(Debug, Deserialize)]
struct RawPath {
    path_id: String,
    converted: bool,
    channels: Vec<String>,
}

impl PathRecord {
    /// Parses one NDJSON line of the path output.
    pub fn from_json(line: &str) -> Result<Self, String> {
        let r: RawPath = serde_json::from_str(line).map_err(|e| e.to_string())?;
        if r.channels.is_empty() {
            return Err("a path has at least one channel".into());
        }
        Ok(PathRecord { path_id: r.path_id, converted: r.converted, channels: r.channels })
    }
}

/// Which table a PATH is read for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Table {
    Credit,
    Paths,
}

impl Table {
    fn name(self) -> &'static str {
        match self {
            Table::Credit => "credit",
            Table::Paths => "paths",
        }
    }
}

/// One file to read.
#[derive(Debug, Clone, PartialEq, Eq)]
enum Source {
    Ndjson(PathBuf),
    Parquet(PathBuf),
}

fn io_err(path: &Path) -> impl Fn(std::io::Error) -> ReportError + '_ {
    move |error| ReportError::Io { path: path.display().to_string(), error }
}

fn is_parquet(p: &Path) -> bool {
    p.extension().is_some_and(|e| e == "parquet")
}

/// Every `*.parquet` file under `dir`, skipping names that start with `.`
/// or `_`, in path order.
fn parquet_files(dir: &Path, out: &mut Vec<PathBuf>) -> Result<(), ReportError> {
    let mut entries: Vec<(String, PathBuf, bool)> = Vec::new();
    for e in std::fs::read_dir(dir).map_err(io_err(dir))? {
        let e = e.map_err(io_err(dir))?;
        let name = e.file_name().to_string_lossy().into_owned();
        if name.starts_with('.') || name.starts_with('_') {
            continue;
        }
        let is_dir = e.file_type().map_err(io_err(dir))?.is_dir();
        entries.push((name, e.path(), is_dir));
    }
    entries.sort();
    for (_, p, is_dir) in entries {
        if is_dir {
            parquet_files(&p, out)?;
        } else if is_parquet(&p) {
            out.push(p);
        }
    }
    Ok(())
}

/// The files to read for one PATH (see the module docs).
fn sources(path: &Path, table: Table) -> Result<Vec<Source>, ReportError> {
    let meta = std::fs::metadata(path).map_err(io_err(path))?;
    if meta.is_file() {
        return Ok(vec![if is_parquet(path) { Source::Parquet(path.into()) } else { Source::Ndjson(path.into()) }]);
    }
    let sub = path.join(table.name());
    if sub.is_dir() {
        return sources(&sub, table);
    }
    let prefix = format!("{}-", table.name());
    let mut ndjson: Vec<PathBuf> = Vec::new();
    for e in std::fs::read_dir(path).map_err(io_err(path))? {
        let e = e.map_err(io_err(path))?;
        let name = e.file_name().to_string_lossy().into_owned();
        if name.starts_with(&prefix) && name.ends_with(".ndjson") && e.file_type().map_err(io_err(path))?.is_file() {
            ndjson.push(e.path());
        }
    }
    ndjson.sort();
    let mut parquet = Vec::new();
    parquet_files(path, &mut parquet)?;
    if ndjson.is_empty() && parquet.is_empty() {
        return Err(ReportError::NoInput(format!(
            "{}: no {prefix}*.ndjson files and no *.parquet files (files ending in .partial are still being written \
             and are not read)",
            path.display()
        )));
    }
    Ok(ndjson.into_iter().map(Source::Ndjson).chain(parquet.into_iter().map(Source::Parquet)).collect())
}

/// Calls `f` with every non-empty line of an NDJSON file and its number.
fn for_lines(path: &Path, mut f: impl FnMut(u64, &str) -> Result<(), String>) -> Result<(), ReportError> {
    let file = File::open(path).map_err(io_err(path))?;
    let mut r = BufReader::with_capacity(1 << 20, file);
    let mut line = String::new();
    let mut n = 0u64;
    loop {
        line.clear();
        if r.read_line(&mut line).map_err(io_err(path))? == 0 {
            return Ok(());
        }
        n += 1;
        let text = line.trim();
        if text.is_empty() {
            continue;
        }
        f(n, text).map_err(|detail| ReportError::Row { path: path.display().to_string(), row: n, detail })?;
    }
}

fn pq_err(path: &Path) -> impl Fn(parquet::errors::ParquetError) -> ReportError + '_ {
    move |e| ReportError::Parquet { path: path.display().to_string(), detail: e.to_string() }
}

/// Calls `f` with every record batch of a Parquet file, reading only
/// `columns`.
fn for_batches(
    path: &Path,
    table: Table,
    columns: &[&str],
    mut f: impl FnMut(&RecordBatch, u64) -> Result<(), ReportError>,
) -> Result<(), ReportError> {
    let file = File::open(path).map_err(io_err(path))?;
    let builder = ParquetRecordBatchReaderBuilder::try_new(file).map_err(pq_err(path))?;
    let names: HashSet<String> = builder.schema().fields().iter().map(|f| f.name().clone()).collect();
    for c in columns {
        if !names.contains(*c) {
            return Err(ReportError::Parquet {
                path: path.display().to_string(),
                detail: format!("no column {c:?}: not a file of the {} table", table.name()),
            });
        }
    }
    let mask = ProjectionMask::columns(builder.parquet_schema(), columns.iter().copied());
    let reader = builder.with_projection(mask).build().map_err(pq_err(path))?;
    let mut first_row = 1u64;
    for b in reader {
        let b = b.map_err(|e| ReportError::Parquet { path: path.display().to_string(), detail: e.to_string() })?;
        f(&b, first_row)?;
        first_row += b.num_rows() as u64;
    }
    Ok(())
}

fn column<'a, T: 'static>(b: &'a RecordBatch, name: &str, path: &Path) -> Result<&'a T, ReportError> {
    b.column_by_name(name).and_then(|c| c.as_any().downcast_ref::<T>()).ok_or_else(|| ReportError::Parquet {
        path: path.display().to_string(),
        detail: format!("column {name:?} is missing or of another type than the contract's"),
    })
}

fn opt_str(a: &StringArray, i: usize) -> Option<String> {
    (!a.is_null(i)).then(|| a.value(i).to_string())
}

const CREDIT_COLUMNS: [&str; 11] = [
    "conversion_id",
    "model",
    "model_version",
    "goal",
    "channel",
    "campaign",
    "position",
    "conversion_timestamp",
    "credit",
    "credited_value",
    "currency",
];

fn read_credit_parquet(path: &Path, out: &mut Vec<CreditRecord>) -> Result<(), ReportError> {
    for_batches(path, Table::Credit, &CREDIT_COLUMNS, |b, first_row| {
        let conv = column::<StringArray>(b, "conversion_id", path)?;
        let model = column::<StringArray>(b, "model", path)?;
        let version = column::<StringArray>(b, "model_version", path)?;
        let goal = column::<StringArray>(b, "goal", path)?;
        let channel = column::<StringArray>(b, "channel", path)?;
        let campaign = column::<StringArray>(b, "campaign", path)?;
        let position = column::<Int32Array>(b, "position", path)?;
        let ts = column::<TimestampMillisecondArray>(b, "conversion_timestamp", path)?;
        let credit = column::<Float64Array>(b, "credit", path)?;
        let value = column::<Float64Array>(b, "credited_value", path)?;
        let currency = column::<StringArray>(b, "currency", path)?;
        for i in 0..b.num_rows() {
            let row = first_row + i as u64;
            let bad = |detail: String| ReportError::Row { path: path.display().to_string(), row, detail };
            if conv.is_null(i) || model.is_null(i) || channel.is_null(i) || ts.is_null(i) || credit.is_null(i) {
                return Err(bad("a required field is null".into()));
            }
            let rec = CreditRecord {
                conversion_id: conv.value(i).to_string(),
                model: model.value(i).to_string(),
                model_version: opt_str(version, i),
                goal: opt_str(goal, i).unwrap_or_else(|| "conversion".into()),
                channel: channel.value(i).to_string(),
                campaign: opt_str(campaign, i),
                position: u32::try_from(position.value(i)).map_err(|_| bad("negative position".into()))?,
                conversion_ms: ts.value(i),
                credit: credit.value(i),
                credited_value: (!value.is_null(i)).then(|| value.value(i)),
                currency: opt_str(currency, i),
            };
            rec.check().map_err(bad)?;
            out.push(rec);
        }
        Ok(())
    })
}

fn read_paths_parquet(path: &Path, out: &mut Vec<PathRecord>) -> Result<(), ReportError> {
    for_batches(path, Table::Paths, &["path_id", "converted", "channels"], |b, first_row| {
        let id = column::<StringArray>(b, "path_id", path)?;
        let converted = column::<BooleanArray>(b, "converted", path)?;
        let channels = column::<ListArray>(b, "channels", path)?;
        for i in 0..b.num_rows() {
            let row = first_row + i as u64;
            let bad = |detail: &str| ReportError::Row { path: path.display().to_string(), row, detail: detail.into() };
            if id.is_null(i) || converted.is_null(i) || channels.is_null(i) {
                return Err(bad("a required field is null"));
            }
            let list = channels.value(i);
            let names =
                list.as_any().downcast_ref::<StringArray>().ok_or_else(|| bad("channels is not a list of strings"))?;
            let chans: Vec<String> = (0..names.len()).map(|k| names.value(k).to_string()).collect();
            if chans.is_empty() {
                return Err(bad("a path has at least one channel"));
            }
            out.push(PathRecord { path_id: id.value(i).to_string(), converted: converted.value(i), channels: chans });
        }
        Ok(())
    })
}

/// Reads every credit row under `paths` (see the module docs), in file
/// order. Duplicates are dropped later, by [`group_by_conversion`].
pub fn read_credit(paths: &[PathBuf]) -> Result<Vec<CreditRecord>, ReportError> {
    let mut out = Vec::new();
    for p in paths {
        for s in sources(p, Table::Credit)? {
            match s {
                Source::Ndjson(f) => for_lines(&f, |_, line| {
                    out.push(CreditRecord::from_json(line)?);
                    Ok(())
                })?,
                Source::Parquet(f) => read_credit_parquet(&f, &mut out)?,
            }
        }
    }
    Ok(out)
}

/// Reads every closed path under `paths`, dropping repeated `path_id`s.
pub fn read_paths(paths: &[PathBuf]) -> Result<Vec<PathRecord>, ReportError> {
    let mut out = Vec::new();
    for p in paths {
        for s in sources(p, Table::Paths)? {
            match s {
                Source::Ndjson(f) => for_lines(&f, |_, line| {
                    out.push(PathRecord::from_json(line)?);
                    Ok(())
                })?,
                Source::Parquet(f) => read_paths_parquet(&f, &mut out)?,
            }
        }
    }
    let mut seen = HashSet::with_capacity(out.len());
    out.retain(|p| seen.insert(p.path_id.clone()));
    Ok(out)
}

/// Groups credit rows by conversion, in order of first appearance, and
/// drops repeated (model, position) rows of a conversion (the first copy
/// is kept).
pub fn group_by_conversion(rows: Vec<CreditRecord>) -> Vec<Vec<CreditRecord>> {
    let mut index: HashMap<String, usize> = HashMap::new();
    let mut groups: Vec<Vec<CreditRecord>> = Vec::new();
    let mut seen: HashSet<(usize, String, u32)> = HashSet::new();
    for r in rows {
        let g = match index.get(&r.conversion_id) {
            Some(&g) => g,
            None => {
                index.insert(r.conversion_id.clone(), groups.len());
                groups.push(Vec::new());
                groups.len() - 1
            }
        };
        if seen.insert((g, r.model.clone(), r.position)) {
            groups[g].push(r);
        }
    }
    groups
}

#[cfg(test)]
mod tests {
    use super::*;

    const ROW: &str = r#"{"credit_id":"x","conversion_id":"c1","user_key":"k","model":"linear","model_version":null,"goal":"purchase","touch_event_id":"t1","channel":"email","campaign":"spring","interaction":"click","position":1,"path_length":1,"touch_timestamp":"2026-03-01T10:00:00.000Z","conversion_timestamp":"2026-03-01T11:00:00.000Z","credit":1.0,"credited_value":25.5,"currency":"EUR"}"#;

    #[test]
    fn reads_a_contract_row() {
        let r = CreditRecord::from_json(ROW).unwrap();
        assert_eq!((r.conversion_id.as_str(), r.model.as_str(), r.channel.as_str()), ("c1", "linear", "email"));
        assert_eq!(r.campaign.as_deref(), Some("spring"));
        assert_eq!(r.conversion_timestamp(), "2026-03-01T11:00:00.000Z");
        assert_eq!((r.credit, r.credited_value), (1.0, Some(25.5)));
        let bad = ROW.replace("\"credit\":1.0", "\"credit\":-1.0");
        assert!(CreditRecord::from_json(&bad).unwrap_err().contains("credit"));
        let bad = ROW.replace("2026-03-01T11:00:00.000Z", "yesterday");
        assert!(CreditRecord::from_json(&bad).unwrap_err().contains("conversion_timestamp"));
    }

    #[test]
    fn directory_of_rotated_files_ignores_partial_ones() {
        let dir = tempfile::tempdir().unwrap();
        let d = dir.path();
        std::fs::write(d.join("credit-000001.ndjson"), format!("{ROW}\n")).unwrap();
        std::fs::write(d.join("credit-000002.ndjson"), format!("\n{}\n", ROW.replace("c1", "c2"))).unwrap();
        std::fs::write(d.join("credit-000003.ndjson.partial"), format!("{}\n", ROW.replace("c1", "c3"))).unwrap();
        std::fs::write(d.join("paths-000001.ndjson"), "not json\n").unwrap();
        let rows = read_credit(&[d.to_path_buf()]).unwrap();
        let ids: Vec<&str> = rows.iter().map(|r| r.conversion_id.as_str()).collect();
        assert_eq!(ids, ["c1", "c2"]);
        // The paths file is broken: the error names file and line.
        let e = read_paths(&[d.to_path_buf()]).unwrap_err().to_string();
        assert!(e.contains("paths-000001.ndjson: row 1:"), "{e}");
        let empty = tempfile::tempdir().unwrap();
        let e = read_credit(&[empty.path().to_path_buf()]).unwrap_err().to_string();
        assert!(e.contains("no credit-*.ndjson files"), "{e}");
    }

    #[test]
    fn duplicates_are_dropped() {
        let a = CreditRecord::from_json(ROW).unwrap();
        let mut b = a.clone();
        b.credit = 0.5; // a second copy of the same row: the first one wins
        let mut c = a.clone();
        c.model = "last_touch".into();
        let groups = group_by_conversion(vec![a.clone(), b, c.clone()]);
        assert_eq!(groups, vec![vec![a, c]]);
    }
}
