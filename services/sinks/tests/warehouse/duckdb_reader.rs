//! ParquetSink read by an outside reader: DuckDB (from PyPI) over the hive
//! partitioned files, compared with the same rows written as NDJSON by the
//! file sink and read by DuckDB's JSON reader.

use std::path::Path;
use std::process::Command;
use std::time::Duration;

use apportion_sinks::ndjson::NdjsonSink;
use apportion_sinks::parquet::ParquetSink;
use apportion_sinks::Sink;
use serde_json::Value;

use crate::rows::{self, close};

const SCRIPT: &str = r#"
import json, sys
import duckdb
pq_dir, nd_dir = sys.argv[1], sys.argv[2]
con = duckdb.connect()
credit_pq = f"read_parquet('{pq_dir}/credit/*/*.parquet', hive_partitioning=true)"
paths_pq = f"read_parquet('{pq_dir}/paths/*/*.parquet', hive_partitioning=true)"
credit_nd = f"read_json('{nd_dir}/credit-*.ndjson', format='newline_delimited')"
paths_nd = f"read_json('{nd_dir}/paths-*.ndjson', format='newline_delimited')"
def rows(sql):
    return con.execute(sql).fetchall()
def by_model(src):
    return [[m, n, c, v] for (m, n, c, v) in rows(
        f"SELECT model, count(*), sum(credit), sum(coalesce(credited_value, 0)) FROM {src} GROUP BY model ORDER BY model")]
out = {
    "version": duckdb.__version__,
    "parquet": by_model(credit_pq),
    "ndjson": by_model(credit_nd),
    # The hive 'date' column is the UTC day of conversion_timestamp.
    "wrong_date": rows(f"SELECT count(*) FROM {credit_pq} WHERE (date - DATE '1970-01-01') <> floor(epoch_ms(conversion_timestamp) / 86400000)")[0][0],
    "not_one": rows(f"SELECT count(*) FROM (SELECT conversion_id, model FROM {credit_pq} GROUP BY ALL HAVING abs(sum(credit) - 1) > 1e-9)")[0][0],
    "types": {n: t for (n, t, *_ ) in rows(f"DESCRIBE SELECT * FROM {credit_pq}")},
    "path_types": {n: t for (n, t, *_ ) in rows(f"DESCRIBE SELECT * FROM {paths_pq}")},
    "paths_parquet": list(rows(f"SELECT count(*), sum(len(channels)), sum(touch_count), count(*) FILTER (WHERE converted) FROM {paths_pq}")[0]),
    "paths_ndjson": list(rows(f"SELECT count(*), sum(len(channels)), sum(touch_count), count(*) FILTER (WHERE converted) FROM {paths_nd}")[0]),
    "same_timestamps": rows(f"SELECT count(*) FROM {credit_pq} p JOIN {credit_nd} n USING (credit_id) WHERE epoch_ms(p.conversion_timestamp) = epoch_ms(CAST(n.conversion_timestamp AS TIMESTAMPTZ))")[0][0],
}
print(json.dumps(out))
"#;

/// Runs the script, or says why it cannot run.
fn duckdb(pq: &Path, nd: &Path) -> Result<Value, String> {
    let probe = Command::new("python3").args(["-c", "import duckdb"]).output();
    match probe {
        Err(e) => return Err(format!("python3 not available: {e}")),
        Ok(o) if !o.status.success() => {
            return Err(format!("duckdb not importable: {}", String::from_utf8_lossy(&o.stderr).trim()))
        }
        Ok(_) => {}
    }
    let o = Command::new("python3").args(["-c", SCRIPT]).arg(pq).arg(nd).output().expect("python3 ran a moment ago");
    assert!(o.status.success(), "duckdb script failed: {}", String::from_utf8_lossy(&o.stderr));
    Ok(serde_json::from_slice(&o.stdout).expect("JSON from the script"))
}

#[test]
fn duckdb_reads_the_parquet_output_like_the_ndjson_output() {
    let input = rows::scenario();
    rows::check_scenario(&input);
    let pq = tempfile::tempdir().unwrap();
    let nd = tempfile::tempdir().unwrap();
    let mut p = ParquetSink::open(pq.path(), 64 << 20, Duration::from_secs(3600)).unwrap();
    let mut n = NdjsonSink::open(nd.path(), 64 << 20).unwrap();
    for b in rows::batches(3) {
        p.write(&b).unwrap();
        n.write(&b).unwrap();
    }
    p.close().unwrap();
    n.close().unwrap();

    let out = match duckdb(pq.path(), nd.path()) {
        Ok(v) => v,
        Err(why) if !rows::servers_required() => {
            println!("skipped: {why}");
            return;
        }
        Err(why) => panic!("APPORTION_REQUIRE_SERVERS is set but DuckDB cannot run: {why}"),
    };
    println!("duckdb {}", out["version"]);

    // Per model: row count, sum of credit, sum of credited value, the same
    // from Parquet, from NDJSON and from the rows in memory.
    let expected = rows::totals_by_model(&input.credit);
    for source in ["parquet", "ndjson"] {
        let got = out[source].as_array().unwrap();
        assert_eq!(got.len(), expected.len(), "{source}");
        for (row, (model, (credit, value, count))) in got.iter().zip(&expected) {
            assert_eq!(row[0].as_str().unwrap(), model, "{source}");
            assert_eq!(row[1].as_u64().unwrap() as usize, *count, "{source} {model}");
            assert!(close(row[2].as_f64().unwrap(), *credit), "{source} {model}: {row}");
            assert!(close(row[3].as_f64().unwrap(), *value), "{source} {model}: {row}");
            assert!(close(*credit, rows::CONVERSIONS as f64));
        }
    }
    assert_eq!(out["wrong_date"], 0);
    assert_eq!(out["not_one"], 0);
    assert_eq!(out["same_timestamps"].as_u64().unwrap() as usize, input.credit.len());
    assert_eq!(out["paths_parquet"], out["paths_ndjson"]);
    assert_eq!(out["paths_parquet"][0].as_u64().unwrap() as usize, input.paths.len());

    // Column types as DuckDB sees them (DuckDB's Parquet type mapping).
    let t = &out["types"];
    assert_eq!(t["conversion_timestamp"], "TIMESTAMP WITH TIME ZONE");
    assert_eq!(t["touch_timestamp"], "TIMESTAMP WITH TIME ZONE");
    assert_eq!(t["position"], "INTEGER");
    assert_eq!(t["path_length"], "INTEGER");
    assert_eq!(t["credit"], "DOUBLE");
    assert_eq!(t["credit_id"], "VARCHAR");
    assert_eq!(t["date"], "DATE");
    assert_eq!(out["path_types"]["channels"], "VARCHAR[]");
    assert_eq!(out["path_types"]["converted"], "BOOLEAN");
}
