//! Test rows: the engine's output for a few hand-written events of the demo
//! shop (the example trail shop), under the five rule models.

use std::collections::BTreeMap;

use apportion_engine::replay::replay_lines;
use apportion_engine::{CreditRow, ModelPlan, PathRow, Pseudonymizer, Rules};
use apportion_sinks::OutputBatch;

pub const MODELS: [&str; 5] = ["last_touch", "first_touch", "linear", "time_decay", "u_shaped"];

/// Touches, conversions and an abandoned journey spread over several UTC
/// dates, with conversions one millisecond either side of midnight and one
/// timestamp given with a +02:00 offset.
const EVENTS: &[&str] = &[
    r#"{"type":"touch","event_id":"t-a1","user_id":"cust-001","timestamp":"2026-05-08T09:00:00Z","channel":"email","campaign":"spring-sale"}"#,
    r#"{"type":"touch","event_id":"t-a2","user_id":"cust-001","timestamp":"2026-05-09T12:00:00Z","channel":"paid_search","campaign":"tents-brand"}"#,
    r#"{"type":"touch","event_id":"t-a3","user_id":"cust-001","timestamp":"2026-05-10T14:00:00Z","channel":"social","campaign":"trail-video","interaction":"view"}"#,
    r#"{"type":"conversion","event_id":"c-a","user_id":"cust-001","timestamp":"2026-05-10T23:59:59.999Z","goal":"purchase","value":120,"currency":"USD"}"#,
    r#"{"type":"touch","event_id":"t-b1","user_id":"cust-002","timestamp":"2026-05-09T08:00:00Z","channel":"display","interaction":"view"}"#,
    r#"{"type":"touch","event_id":"t-b2","user_id":"cust-002","timestamp":"2026-05-10T20:00:00Z","channel":"email","campaign":"boots-restock"}"#,
    r#"{"type":"conversion","event_id":"c-b","user_id":"cust-002","timestamp":"2026-05-11T00:00:00.000Z","goal":"purchase","value":45.5,"currency":"EUR"}"#,
    r#"{"type":"conversion","event_id":"c-c","user_id":"cust-003","timestamp":"2026-05-11T10:00:00Z","goal":"newsletter_signup"}"#,
    r#"{"type":"touch","event_id":"t-d1","user_id":"cust-004","timestamp":"2026-04-01T10:00:00Z","channel":"paid_search","campaign":"stoves"}"#,
    r#"{"type":"touch","event_id":"t-e1","user_id":"cust-005","timestamp":"2026-05-12T07:00:00Z","channel":"organic_search"}"#,
    r#"{"type":"conversion","event_id":"c-e1","user_id":"cust-005","timestamp":"2026-05-12T08:00:00Z","goal":"purchase","value":80,"currency":"USD"}"#,
    r#"{"type":"touch","event_id":"t-e2","user_id":"cust-005","timestamp":"2026-05-12T09:00:00Z","channel":"affiliate","campaign":"gear-blog"}"#,
    r#"{"type":"touch","event_id":"t-e3","user_id":"cust-005","timestamp":"2026-05-12T18:30:00Z","channel":"email","campaign":"spring-sale"}"#,
    r#"{"type":"conversion","event_id":"c-e2","user_id":"cust-005","timestamp":"2026-05-13T01:00:00Z","goal":"purchase","value":310.25,"currency":"USD"}"#,
    r#"{"type":"touch","event_id":"t-f1","user_id":"cust-006","timestamp":"2026-05-11T05:30:00+02:00","channel":"social"}"#,
    r#"{"type":"conversion","event_id":"c-f","user_id":"cust-006","timestamp":"2026-05-11T03:40:00Z","goal":"purchase","value":19.99,"currency":"USD"}"#,
];

/// Number of conversions in [`EVENTS`].
pub const CONVERSIONS: usize = 6;

/// The engine's rows for [`EVENTS`].
pub fn scenario() -> OutputBatch {
    let p = Pseudonymizer::new(b"example-shop-test-key");
    let r = replay_lines(EVENTS, Rules::default(), &p, &ModelPlan::rules());
    assert!(r.rejected.is_empty(), "test events rejected: {:?}", r.rejected);
    assert_eq!(r.duplicates, 0);
    OutputBatch { credit: r.rows, paths: r.paths, ..OutputBatch::default() }
}

/// The scenario cut into `n` batches (credit and paths cut alike).
pub fn batches(n: usize) -> Vec<OutputBatch> {
    let all = scenario();
    let mut out: Vec<OutputBatch> = (0..n).map(|_| OutputBatch::default()).collect();
    for (i, r) in all.credit.into_iter().enumerate() {
        out[i % n].credit.push(r);
    }
    for (i, p) in all.paths.into_iter().enumerate() {
        out[i % n].paths.push(p);
    }
    out
}

/// Sum of credit and of credited value, and row count, per model.
pub fn totals_by_model(rows: &[CreditRow]) -> BTreeMap<String, (f64, f64, usize)> {
    let mut out: BTreeMap<String, (f64, f64, usize)> = BTreeMap::new();
    for r in rows {
        let e = out.entry(r.model.to_string()).or_default();
        e.0 += r.credit;
        e.1 += r.credited_value.unwrap_or(0.0);
        e.2 += 1;
    }
    out
}

/// The UTC date (`YYYY-MM-DD`) of a timestamp.
pub fn utc_date(ts: apportion_engine::contract::Timestamp) -> String {
    apportion_engine::contract::time::date_of_ms(ts.ms())
}

pub fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-9 * a.abs().max(b.abs()).max(1.0)
}

/// Sanity of the input itself, so the store checks below compare against
/// something known: every conversion sums to 1 per model (the contract).
pub fn check_scenario(b: &OutputBatch) {
    let mut per: BTreeMap<(String, String), f64> = BTreeMap::new();
    for r in &b.credit {
        *per.entry((r.conversion_id.clone(), r.model.to_string())).or_default() += r.credit;
    }
    assert_eq!(per.len(), CONVERSIONS * MODELS.len());
    assert!(per.values().all(|s| close(*s, 1.0)), "{per:?}");
    assert!(b.credit.iter().any(|r| r.channel == apportion_engine::contract::UNATTRIBUTED));
    assert!(b.paths.iter().any(|p| !p.converted), "the scenario has an abandoned journey");
}

#[allow(dead_code)]
pub fn path_by_id(paths: &[PathRow]) -> BTreeMap<String, PathRow> {
    paths.iter().map(|p| (p.path_id.clone(), p.clone())).collect()
}

/// Whether servers and outside tools are required (CI): then a missing one
/// fails the test instead of skipping it.
pub fn servers_required() -> bool {
    std::env::var_os("APPORTION_REQUIRE_SERVERS").is_some_and(|v| !v.is_empty())
}
