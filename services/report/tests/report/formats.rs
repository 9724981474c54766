//! Inputs and outputs: a streaming feed equals the batch command, Parquet
//! trees read like NDJSON files, and the HTML tables show the JSON numbers.

use std::path::Path;
use std::time::Duration;

use apportion_report::bootstrap::BootstrapOptions;
use apportion_report::render::{json, render, Format};
use apportion_report::{build_report, CompareOptions, Comparison, CreditRecord, Report, ReportInputs};
use apportion_sinks::parquet::ParquetSink;
use apportion_sinks::{OutputBatch, Sink};
use serde_json::Value;

use crate::support::{ndjson, simulated};

fn inputs(credits: &Path, paths: &Path) -> ReportInputs {
    ReportInputs {
        credits: vec![credits.to_path_buf()],
        paths: vec![paths.to_path_buf()],
        bootstrap: BootstrapOptions { resamples: 20, threads: 2, ..Default::default() },
        ..Default::default()
    }
}

/// `serve` can feed each conversion as it credits it (GET /v1/compare);
/// the batch command reads the files it wrote. Both must give the same
/// JSON, whatever the order of conversions, and the batch command must
/// ignore files still being written and rows delivered twice.
#[test]
fn streaming_feed_equals_the_batch_command() {
    let sim = simulated(1500, 9);
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let rows = &sim.replay.rows;
    let half = rows.len() / 2;
    std::fs::write(d.join("credit-000001.ndjson"), ndjson(&rows[..half])).unwrap();
    // The second file repeats 300 rows of the first (at-least-once delivery).
    let mut second = ndjson(&rows[half - 300..]);
    second.push('\n');
    std::fs::write(d.join("credit-000002.ndjson"), second).unwrap();
    // A file still being written holds a conversion that must not count.
    let mut extra = rows[0].clone();
    extra.conversion_id = "not-sealed-yet".into();
    std::fs::write(d.join("credit-000003.ndjson.partial"), ndjson(&[extra])).unwrap();
    std::fs::write(d.join("paths-000001.ndjson"), ndjson(&sim.replay.paths)).unwrap();
    let batch = build_report(&inputs(d, d)).unwrap();
    assert_eq!(batch.comparison.conversions, sim.truth.conversions);

    // The stream: conversions in reverse order, rows within each reversed,
    // converted from the engine's own row type.
    let mut groups: Vec<Vec<CreditRecord>> = Vec::new();
    for r in rows {
        let rec = CreditRecord::from_serialized(r).unwrap();
        // The service's direct conversion (no JSON) reads the same fields.
        assert_eq!(CreditRecord::from_row(r), rec);
        match groups.last_mut() {
            Some(g) if g[0].conversion_id == rec.conversion_id => g.push(rec),
            _ => groups.push(vec![rec]),
        }
    }
    let mut stream = Comparison::new(CompareOptions::default());
    for g in groups.iter_mut().rev() {
        g.reverse();
        stream.add_conversion(g).unwrap();
        if stream.conversions() == 100 {
            // Answering in between does not disturb the accumulator.
            let _ = serde_json::to_string(&stream.result().unwrap()).unwrap();
        }
    }
    let streamed = serde_json::to_string(&stream.result().unwrap()).unwrap();
    let batched = serde_json::to_string(&batch.comparison).unwrap();
    if let Some(i) = streamed.bytes().zip(batched.bytes()).position(|(a, b)| a != b) {
        let at = |s: &str| s[i.saturating_sub(200)..(i + 80).min(s.len())].to_string();
        panic!("the JSON differs at byte {i}:\nstream: {}\nbatch:  {}", at(&streamed), at(&batched));
    }
    assert_eq!(streamed, batched);
}

/// The Parquet sink's tree (and one table's `date=` tree) read exactly like
/// the NDJSON files of the same rows: the same report, byte for byte.
#[test]
fn parquet_tree_reads_like_ndjson() {
    let sim = simulated(800, 2);
    let dir = tempfile::tempdir().unwrap();
    let pq = dir.path().join("parquet");
    let mut sink = ParquetSink::open(&pq, 1 << 30, Duration::from_secs(3600)).unwrap();
    // Three batches (each stages one segment per date and fsyncs it).
    let credit: Vec<_> = sim.replay.rows.chunks(sim.replay.rows.len() / 3 + 1).collect();
    let paths: Vec<_> = sim.replay.paths.chunks(sim.replay.paths.len() / 2 + 1).collect();
    for i in 0..credit.len().max(paths.len()) {
        let batch = OutputBatch {
            credit: credit.get(i).map_or(Vec::new(), |c| c.to_vec()),
            paths: paths.get(i).map_or(Vec::new(), |p| p.to_vec()),
            ..Default::default()
        };
        sink.write(&batch).unwrap();
    }
    sink.close().unwrap();
    let nd_credit = dir.path().join("credit.ndjson");
    let nd_paths = dir.path().join("paths.ndjson");
    std::fs::write(&nd_credit, ndjson(&sim.replay.rows)).unwrap();
    std::fs::write(&nd_paths, ndjson(&sim.replay.paths)).unwrap();
    let want = json(&build_report(&inputs(&nd_credit, &nd_paths)).unwrap());
    let days = std::fs::read_dir(pq.join("credit")).unwrap().count();
    assert!(days > 10, "date partitions: {days}");
    for (credits, paths) in [(pq.clone(), pq.clone()), (pq.join("credit"), pq.join("paths"))] {
        let got = json(&build_report(&inputs(&credits, &paths)).unwrap());
        assert!(got == want, "{} differs from the NDJSON report", credits.display());
    }
    // Path files given as credit rows: an error that says so.
    let e = build_report(&inputs(&pq.join("paths"), &pq)).unwrap_err().to_string();
    assert!(e.contains("no column \"model\": not a file of the credit table"), "{e}");
}

/// Finds `name="..."` in a tag.
fn attr<'a>(tag: &'a str, name: &str) -> Option<&'a str> {
    let start = tag.find(&format!(" {name}=\""))? + name.len() + 3;
    let len = tag[start..].find('"')?;
    Some(&tag[start..start + len])
}

/// Every numeric cell of the HTML names a JSON pointer and the value there;
/// the value must be the JSON report's, and the text its rounding.
pub fn check_cells(html: &str, report: &Value) -> usize {
    let mut n = 0;
    for piece in html.split("<td").skip(1) {
        let tag = &piece[..piece.find('>').unwrap()];
        let Some(path) = attr(tag, "data-path") else { continue };
        let shown = &piece[tag.len() + 1..piece.find("</td>").unwrap()];
        let want = report.pointer(path).unwrap_or_else(|| panic!("{path} is not in the JSON"));
        let value = attr(tag, "data-value").unwrap();
        if value == "null" {
            assert!(want.is_null(), "{path}");
            assert_eq!(shown, "n/a");
        } else {
            let v: f64 = value.parse().unwrap();
            assert_eq!(Some(v), want.as_f64(), "{path}");
            let percent = shown.ends_with('%');
            let text = shown.trim_end_matches('%').trim_start_matches('+');
            let decimals = text.split('.').nth(1).map_or(0, str::len);
            let x: f64 = text.parse().unwrap_or_else(|_| panic!("{path}: {shown:?}"));
            let scaled = if percent { v * 100.0 } else { v };
            assert!((x - scaled).abs() <= 0.5 * 10f64.powi(-(decimals as i32)) + 1e-9, "{path}: {shown} vs {v}");
        }
        n += 1;
    }
    n
}

#[test]
fn html_tables_show_the_json_numbers_and_escape_names() {
    let sim = simulated(1000, 4);
    let dir = tempfile::tempdir().unwrap();
    // A channel name that would be markup if it were not escaped.
    let hostile = r#"<img src=x onerror="alert(1)">&co"#;
    let rows: Vec<_> = sim
        .replay
        .rows
        .iter()
        .cloned()
        .map(|mut r| {
            if r.channel == "display" {
                r.channel = hostile.into();
            }
            r
        })
        .collect();
    let paths: Vec<_> = sim
        .replay
        .paths
        .iter()
        .cloned()
        .map(|mut p| {
            for c in &mut p.channels {
                if c == "display" {
                    *c = hostile.into();
                }
            }
            p
        })
        .collect();
    let (c, p) = (dir.path().join("c.ndjson"), dir.path().join("p.ndjson"));
    std::fs::write(&c, ndjson(&rows)).unwrap();
    std::fs::write(&p, ndjson(&paths)).unwrap();
    let report: Report = build_report(&inputs(&c, &p)).unwrap();
    let html = render(&report, Format::Html);
    assert!(!html.contains(hostile) && !html.contains("<img") && !html.contains("<script"));
    assert!(html.contains("&lt;img src=x onerror=&quot;alert(1)&quot;&gt;&amp;co"));
    let value: Value = serde_json::from_str(&json(&report)).unwrap();
    let cells = check_cells(&html, &value);
    // Credit and value tables (7 models x (8 keys + total)), 2 difference
    // tables (6 models x 2 x 8), 6 shift tables (8 x 9 + 8), bootstrap
    // (7 channels x 2 models x 4).
    let keys = report.comparison.keys.len();
    assert_eq!(keys, 7);
    let want = 2 * 7 * (keys + 1) + 2 * 6 * 2 * keys + 6 * (keys * (keys + 1) + keys) + keys * 2 * 4;
    assert_eq!(cells, want);
    for id in ["chart-credit", "chart-value", "chart-difference", "chart-bootstrap"] {
        assert!(html.contains(&format!(r#"<svg id="{id}""#)), "{id}");
    }
    for m in &report.comparison.models[1..] {
        assert!(html.contains(&format!(r#"<svg id="chart-shift-{m}""#)), "{m}");
        assert!(html.contains(&format!(r#"<table id="table-shift-{m}">"#)), "{m}");
    }
    for text in &report.cautions {
        assert!(html.contains(&text.replace('\'', "&#39;")), "caution missing");
    }
    // The other formats carry the same numbers.
    let csv = render(&report, Format::Csv);
    let total = &report.comparison.model_totals[0];
    assert!(
        csv.contains(&format!("model_total,{},,,,credited_conversions,{}\n", total.model, total.credited_conversions))
    );
    let table = render(&report, Format::Table);
    assert!(table.contains("Conversions credited") && table.contains(&report.cautions[0]));
}
