//! ParquetSink: files read back with the `parquet` crate's arrow reader.
//! Check values: the rows that went in (round trip), and file layouts
//! derived by hand from the sink's documented partitioning.

use std::collections::BTreeMap;
use std::fs::File;
use std::path::{Path, PathBuf};
use std::time::Duration;

use apportion_engine::contract::{Interaction, ModelId, Timestamp, UserKey};
use apportion_engine::{CreditRow, PathRow};
use apportion_sinks::parquet::{ParquetSink, STAGING_DIR};
use apportion_sinks::{OutputBatch, Sink};
use arrow_array::cast::AsArray;
use arrow_array::types::{Float64Type, Int32Type, TimestampMillisecondType};
use arrow_array::{Array, RecordBatch};
use arrow_schema::{DataType, TimeUnit};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;

use crate::rows::{self, close};

const HOUR: Duration = Duration::from_secs(3600);

/// Every `part-*.parquet` under `dir/<table>/date=*/`, with its date.
fn part_files(dir: &Path, table: &str) -> Vec<(String, PathBuf)> {
    let mut out = Vec::new();
    let root = dir.join(table);
    if !root.is_dir() {
        return out;
    }
    for d in std::fs::read_dir(&root).unwrap() {
        let d = d.unwrap();
        let name = d.file_name().to_string_lossy().into_owned();
        let date = name.strip_prefix("date=").expect("only date= directories").to_string();
        for f in std::fs::read_dir(d.path()).unwrap() {
            let p = f.unwrap().path();
            let fname = p.file_name().unwrap().to_string_lossy().into_owned();
            assert!(fname.starts_with("part-") && fname.ends_with(".parquet"), "stray file {p:?}");
            out.push((date.clone(), p));
        }
    }
    out.sort();
    out
}

fn read(path: &Path) -> Vec<RecordBatch> {
    let b = ParquetRecordBatchReaderBuilder::try_new(File::open(path).unwrap()).unwrap();
    b.build().unwrap().map(|b| b.unwrap()).collect()
}

fn opt_str(a: &dyn Array, i: usize) -> Option<String> {
    let s = a.as_string::<i32>();
    (!s.is_null(i)).then(|| s.value(i).to_string())
}

fn ts(a: &dyn Array, i: usize) -> Option<Timestamp> {
    let t = a.as_primitive::<TimestampMillisecondType>();
    (!t.is_null(i)).then(|| Timestamp(t.value(i)))
}

fn key(hex: Option<String>) -> UserKey {
    UserKey::from_hex(&hex.expect("user_key")).expect("64 hex digits")
}

fn interaction(s: Option<String>) -> Option<Interaction> {
    s.map(|s| match s.as_str() {
        "click" => Interaction::Click,
        "view" => Interaction::View,
        other => panic!("interaction {other:?}"),
    })
}

/// Credit rows rebuilt from the files, with the partition date of each.
fn read_credit(dir: &Path) -> Vec<(String, CreditRow)> {
    let mut out = Vec::new();
    for (date, path) in part_files(dir, "credit") {
        for b in read(&path) {
            let c = |name: &str| b.column_by_name(name).unwrap_or_else(|| panic!("no column {name}")).clone();
            let f64s = |name: &str| c(name).as_primitive::<Float64Type>().clone();
            let i32s = |name: &str| c(name).as_primitive::<Int32Type>().clone();
            let (credit, value) = (f64s("credit"), f64s("credited_value"));
            let (position, length) = (i32s("position"), i32s("path_length"));
            for i in 0..b.num_rows() {
                let s = |name: &str| opt_str(c(name).as_ref(), i);
                let row = CreditRow {
                    credit_id: s("credit_id").unwrap(),
                    conversion_id: s("conversion_id").unwrap(),
                    user_key: key(s("user_key")),
                    model: ModelId::parse(&s("model").unwrap()).unwrap(),
                    model_version: s("model_version"),
                    goal: s("goal").unwrap(),
                    touch_event_id: s("touch_event_id"),
                    channel: s("channel").unwrap(),
                    campaign: s("campaign"),
                    interaction: interaction(s("interaction")),
                    position: position.value(i) as u32,
                    path_length: length.value(i) as u32,
                    touch_timestamp: ts(c("touch_timestamp").as_ref(), i),
                    conversion_timestamp: ts(c("conversion_timestamp").as_ref(), i).unwrap(),
                    credit: credit.value(i),
                    credited_value: (!value.is_null(i)).then(|| value.value(i)),
                    currency: s("currency"),
                };
                out.push((date.clone(), row));
            }
        }
    }
    out
}

fn read_paths(dir: &Path) -> Vec<(String, PathRow)> {
    let mut out = Vec::new();
    for (date, path) in part_files(dir, "paths") {
        for b in read(&path) {
            let c = |name: &str| b.column_by_name(name).unwrap_or_else(|| panic!("no column {name}")).clone();
            let channels = c("channels");
            let channels = channels.as_list::<i32>();
            let converted = c("converted");
            let converted = converted.as_boolean();
            let count = c("touch_count");
            let count = count.as_primitive::<Int32Type>();
            for i in 0..b.num_rows() {
                let s = |name: &str| opt_str(c(name).as_ref(), i);
                let list = channels.value(i);
                let list = list.as_string::<i32>();
                let row = PathRow {
                    path_id: s("path_id").unwrap(),
                    user_key: key(s("user_key")),
                    converted: converted.value(i),
                    conversion_id: s("conversion_id"),
                    goal: s("goal"),
                    channels: (0..list.len()).map(|j| list.value(j).to_string()).collect(),
                    touch_count: count.value(i) as u32,
                    first_touch_timestamp: ts(c("first_touch_timestamp").as_ref(), i).unwrap(),
                    last_touch_timestamp: ts(c("last_touch_timestamp").as_ref(), i).unwrap(),
                };
                out.push((date.clone(), row));
            }
        }
    }
    out
}

fn sorted_credit(mut v: Vec<CreditRow>) -> Vec<CreditRow> {
    v.sort_by(|a, b| a.credit_id.cmp(&b.credit_id));
    v
}

fn sorted_paths(mut v: Vec<PathRow>) -> Vec<PathRow> {
    v.sort_by(|a, b| a.path_id.cmp(&b.path_id));
    v
}

/// Files (any name) under the staging tree.
fn staged_files(dir: &Path) -> Vec<PathBuf> {
    fn walk(p: &Path, out: &mut Vec<PathBuf>) {
        let Ok(rd) = std::fs::read_dir(p) else { return };
        for e in rd {
            let p = e.unwrap().path();
            if p.is_dir() {
                walk(&p, out);
            } else {
                out.push(p);
            }
        }
    }
    let mut out = Vec::new();
    walk(&dir.join(STAGING_DIR), &mut out);
    out.sort();
    out
}

#[test]
fn parquet_round_trip_of_every_row() {
    let input = rows::scenario();
    rows::check_scenario(&input);
    let dir = tempfile::tempdir().unwrap();
    let mut sink = ParquetSink::open(dir.path(), 64 << 20, HOUR).unwrap();
    assert_eq!(sink.name(), "parquet");
    for b in rows::batches(3) {
        sink.write(&b).unwrap();
    }
    sink.close().unwrap();
    assert!(staged_files(dir.path()).is_empty(), "close() rolls everything");

    // Every row back, field for field, each in the partition of its UTC date.
    let credit = read_credit(dir.path());
    for (date, r) in &credit {
        assert_eq!(date, &rows::utc_date(r.conversion_timestamp), "{r:?}");
    }
    let got = sorted_credit(credit.into_iter().map(|x| x.1).collect());
    assert_eq!(got, sorted_credit(input.credit.clone()));
    let paths = read_paths(dir.path());
    for (date, p) in &paths {
        assert_eq!(date, &rows::utc_date(p.last_touch_timestamp), "{p:?}");
    }
    assert_eq!(sorted_paths(paths.into_iter().map(|x| x.1).collect()), sorted_paths(input.paths.clone()));

    // Totals per model as a reader would compute them.
    let totals = rows::totals_by_model(&got);
    assert_eq!(totals.len(), rows::MODELS.len());
    for (model, (credit, _, _)) in &totals {
        assert!(close(*credit, rows::CONVERSIONS as f64), "{model}: {credit}");
    }
    // (Sums in another order: equal up to rounding.)
    for ((m, a), (n, b)) in totals.iter().zip(&rows::totals_by_model(&input.credit)) {
        assert_eq!((m, a.2), (n, b.2));
        assert!(close(a.0, b.0) && close(a.1, b.1), "{m}: {a:?} vs {b:?}");
    }

    // Conversions at 23:59:59.999 and 00:00:00.000 land on two dates.
    let dates: Vec<String> = part_files(dir.path(), "credit").into_iter().map(|x| x.0).collect();
    assert!(dates.contains(&"2026-05-10".to_string()) && dates.contains(&"2026-05-11".to_string()));
    // One part file per date: the three batches were rolled together.
    let mut dedup = dates.clone();
    dedup.dedup();
    assert_eq!(dates, dedup);
}

#[test]
fn parquet_column_types() {
    let dir = tempfile::tempdir().unwrap();
    let mut sink = ParquetSink::open(dir.path(), 0, HOUR).unwrap();
    sink.write(&rows::scenario()).unwrap();
    let (_, first) = part_files(dir.path(), "credit").remove(0);
    let schema = read(&first)[0].schema();
    let utc_ms = DataType::Timestamp(TimeUnit::Millisecond, Some("UTC".into()));
    for (name, ty, nullable) in [
        ("credit_id", DataType::Utf8, false),
        ("model_version", DataType::Utf8, true),
        ("position", DataType::Int32, false),
        ("path_length", DataType::Int32, false),
        ("touch_timestamp", utc_ms.clone(), true),
        ("conversion_timestamp", utc_ms.clone(), false),
        ("credit", DataType::Float64, false),
        ("credited_value", DataType::Float64, true),
    ] {
        let f = schema.field_with_name(name).unwrap();
        assert_eq!((f.data_type(), f.is_nullable()), (&ty, nullable), "{name}");
    }
    assert_eq!(schema.fields().len(), 17);
    // The Parquet physical and logical types (parquet format spec, LogicalTypes.md:
    // TIMESTAMP(isAdjustedToUTC=true, unit=MILLIS) on INT64).
    let reader = parquet::file::reader::SerializedFileReader::new(File::open(&first).unwrap()).unwrap();
    use parquet::file::reader::FileReader;
    let descr = reader.metadata().file_metadata().schema_descr_ptr();
    let col = descr.columns().iter().find(|c| c.name() == "conversion_timestamp").unwrap();
    assert_eq!(col.physical_type(), parquet::basic::Type::INT64);
    assert_eq!(
        col.logical_type_ref(),
        Some(&parquet::basic::LogicalType::Timestamp(parquet::basic::TimestampType {
            is_adjusted_to_u_t_c: true,
            unit: parquet::basic::TimeUnit::MILLIS
        }))
    );
    let kv = reader.metadata().file_metadata().key_value_metadata().unwrap();
    assert!(kv.iter().any(|k| k.key == "apportion.table" && k.value.as_deref() == Some("credit")));

    let (_, p) = part_files(dir.path(), "paths").remove(0);
    let schema = read(&p)[0].schema();
    let ch = schema.field_with_name("channels").unwrap();
    assert!(matches!(ch.data_type(), DataType::List(item) if item.data_type() == &DataType::Utf8), "{ch:?}");
}

#[test]
fn parquet_rows_invisible_until_roll_but_durable() {
    let input = rows::scenario();
    let dir = tempfile::tempdir().unwrap();
    let mut sink = ParquetSink::open(dir.path(), u64::MAX, HOUR).unwrap();
    sink.write(&input).unwrap();
    // Not rolled yet: readers see nothing, the rows sit in staged segments.
    assert!(part_files(dir.path(), "credit").is_empty());
    assert!(sink.staged_partitions() > 0);
    assert!(!staged_files(dir.path()).is_empty());
    // A crash now (no close): a new sink finds the segments and rolls them.
    drop(sink);
    let mut again = ParquetSink::open(dir.path(), u64::MAX, HOUR).unwrap();
    assert_eq!(again.staged_partitions(), 0);
    assert!(staged_files(dir.path()).is_empty());
    let got = sorted_credit(read_credit(dir.path()).into_iter().map(|x| x.1).collect());
    assert_eq!(got, sorted_credit(input.credit.clone()));
    again.close().unwrap();
}

#[test]
fn parquet_rolls_by_size_and_by_age() {
    let input = rows::scenario();
    // roll_bytes 0: every write() leaves complete part files behind.
    let dir = tempfile::tempdir().unwrap();
    let mut sink = ParquetSink::open(dir.path(), 0, HOUR).unwrap();
    let mut seen = 0;
    for b in rows::batches(2) {
        seen += b.credit.len();
        sink.write(&b).unwrap();
        assert_eq!(sink.staged_partitions(), 0);
        assert_eq!(read_credit(dir.path()).len(), seen);
    }
    // roll_after 0: the same, by age.
    let dir = tempfile::tempdir().unwrap();
    let mut sink = ParquetSink::open(dir.path(), u64::MAX, Duration::ZERO).unwrap();
    sink.write(&input).unwrap();
    assert_eq!(sink.staged_partitions(), 0);
    assert_eq!(read_credit(dir.path()).len(), input.credit.len());
    // An empty batch is a valid write.
    sink.write(&OutputBatch::default()).unwrap();
    sink.close().unwrap();
}

#[test]
fn parquet_recovery_removes_leftovers_without_losing_or_doubling_rows() {
    let all = rows::batches(3);
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // Batches 0 and 1 staged (two segments in most date partitions), the
    // segments copied aside, then rolled by close().
    let mut sink = ParquetSink::open(d, u64::MAX, HOUR).unwrap();
    sink.write(&all[0]).unwrap();
    sink.write(&all[1]).unwrap();
    let segments: Vec<(PathBuf, Vec<u8>)> =
        staged_files(d).into_iter().map(|p| (p.clone(), std::fs::read(&p).unwrap())).collect();
    sink.close().unwrap();
    assert!(staged_files(d).is_empty());
    // A crash in the middle of deleting a roll's segments: the first
    // segment of each partition is gone, the others are still there.
    let mut by_dir: BTreeMap<PathBuf, Vec<&(PathBuf, Vec<u8>)>> = BTreeMap::new();
    for s in &segments {
        by_dir.entry(s.0.parent().unwrap().to_path_buf()).or_default().push(s);
    }
    let mut restored = 0;
    for (dir, segs) in by_dir {
        for (p, bytes) in segs.iter().skip(1) {
            std::fs::create_dir_all(&dir).unwrap();
            std::fs::write(p, bytes).unwrap();
            restored += 1;
        }
    }
    assert!(restored > 0, "some partition had two segments");
    let mut sink = ParquetSink::open(d, u64::MAX, HOUR).unwrap();
    // open() removed them: a part file covers their numbers.
    assert!(staged_files(d).is_empty());
    // Batch 2 staged, then a crash, with a half-written segment and a
    // half-written roll left behind.
    sink.write(&all[2]).unwrap();
    drop(sink);
    let sdir = staged_files(d)[0].parent().unwrap().to_path_buf();
    std::fs::write(sdir.join(".seg-0000009999.parquet.tmp"), b"PAR1 half a file").unwrap();
    let pdir = part_files(d, "credit")[0].1.parent().unwrap().to_path_buf();
    std::fs::write(pdir.join(".part-0000000001-0000009999.parquet.tmp"), b"PAR1 half").unwrap();
    // Reopen: the half files go, batch 2's segments are rolled.
    let mut sink = ParquetSink::open(d, u64::MAX, HOUR).unwrap();
    sink.close().unwrap();
    assert!(staged_files(d).is_empty());
    let names: Vec<String> =
        std::fs::read_dir(&pdir).unwrap().map(|e| e.unwrap().file_name().to_string_lossy().into_owned()).collect();
    assert!(names.iter().all(|n| !n.ends_with(".tmp")), "{names:?}");
    // Exactly the input: nothing lost, nothing twice.
    let input: Vec<CreditRow> = all.iter().flat_map(|b| b.credit.clone()).collect();
    let got = sorted_credit(read_credit(d).into_iter().map(|x| x.1).collect());
    assert_eq!(got.len(), input.len());
    assert_eq!(got, sorted_credit(input));
    let paths_in: Vec<PathRow> = all.iter().flat_map(|b| b.paths.clone()).collect();
    let paths_got = sorted_paths(read_paths(d).into_iter().map(|x| x.1).collect());
    assert_eq!(paths_got, sorted_paths(paths_in));
}

#[test]
fn parquet_rejects_a_row_it_cannot_store_permanently() {
    // position is INT32 in the files (as in deploy/warehouse/postgres.sql):
    // a position above i32::MAX cannot be stored, and retrying cannot help.
    let mut b = rows::scenario();
    b.credit[0].position = u32::MAX;
    let dir = tempfile::tempdir().unwrap();
    let mut sink = ParquetSink::open(dir.path(), 0, HOUR).unwrap();
    let e = sink.write(&b).unwrap_err();
    assert!(!e.retryable, "{e}");
    assert!(e.to_string().contains("position"), "{e}");
    // Nothing of the batch was written.
    assert!(part_files(dir.path(), "credit").is_empty());
    assert!(staged_files(dir.path()).is_empty());
}

/// Sum of credit per (conversion, model): 1 in the files too.
#[test]
fn parquet_credit_sums_to_one_per_conversion_and_model() {
    let dir = tempfile::tempdir().unwrap();
    let mut sink = ParquetSink::open(dir.path(), 1 << 20, HOUR).unwrap();
    for b in rows::batches(4) {
        sink.write(&b).unwrap();
    }
    sink.close().unwrap();
    let mut per: BTreeMap<(String, String), f64> = BTreeMap::new();
    for (_, r) in read_credit(dir.path()) {
        *per.entry((r.conversion_id, r.model.to_string())).or_default() += r.credit;
    }
    assert_eq!(per.len(), rows::CONVERSIONS * rows::MODELS.len());
    for (k, s) in per {
        assert!((s - 1.0).abs() <= 1e-9, "{k:?}: {s}");
    }
}
