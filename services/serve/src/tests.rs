//! Unit tests of the pipeline and the run loop, with in-memory sources and
//! sinks and a temporary store: no broker, no HTTP. Check values are derived
//! by hand from docs/contract.md ("Journey rules", "Streaming time"), or
//! compared with the engine's replay of the same events.

use std::sync::atomic::AtomicBool;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use apportion_contract::{ModelId, Period, RejectReason};
use apportion_engine::replay::replay_lines;
use apportion_engine::{ModelPlan, Pseudonymizer};
use apportion_sinks::{OutputBatch, Sink, SinkError};
use apportion_store::Store;

use crate::config::{Config, Format, LatePolicy};
use crate::metrics::Metrics;
use crate::pipeline::Pipeline;
use crate::run_loop::{run_loop, Shared};
use crate::source::{InMsg, MemorySource, MsgStatus, PartId, Payload};

const KEY: &[u8] = b"pipeline-test-key";
const SEC: i64 = 1000;

fn touch(id: &str, user: &str, ts: i64, channel: &str) -> Vec<u8> {
    format!(r#"{{"type":"touch","event_id":"{id}","user_id":"{user}","timestamp":{ts},"channel":"{channel}"}}"#)
        .into_bytes()
}

fn conversion(id: &str, user: &str, ts: i64) -> Vec<u8> {
    format!(r#"{{"type":"conversion","event_id":"{id}","user_id":"{user}","timestamp":{ts}}}"#).into_bytes()
}

fn config() -> Config {
    Config {
        models: vec![ModelId::Linear],
        allowed_lateness: Period(0),
        idle_timeout: Period(60 * SEC),
        ..Config::default()
    }
}

fn pipeline(cfg: Config, store: Store) -> Pipeline {
    Pipeline::new(cfg, Pseudonymizer::new(KEY), store, Metrics::new(prometheus::Registry::new())).unwrap()
}

fn msgs(first_offset: i64, payloads: Vec<Vec<u8>>, arrived: Instant) -> Vec<InMsg> {
    payloads
        .into_iter()
        .enumerate()
        .map(|(i, payload)| InMsg { offset: first_offset + i as i64, payload, arrived })
        .collect()
}

fn part() -> PartId {
    PartId::new("events", 0)
}

#[test]
fn late_events_follow_the_late_policy() {
    // The watermark after [t=100s] is 100s (allowed lateness 0); a touch at
    // 50s is before it: dead-lettered with reason `late`, or applied.
    for (policy, want_late) in [(LatePolicy::DeadLetter, true), (LatePolicy::Apply, false)] {
        let mut p = pipeline(Config { late_policy: policy, ..config() }, Store::temporary().unwrap());
        p.open_partition(&part(), Payload::Event(Format::Json)).unwrap();
        let now = Instant::now();
        let mut out = OutputBatch::default();
        p.process(&part(), &msgs(1, vec![touch("a", "u", 100 * SEC, "email")], now), &mut out).unwrap();
        assert_eq!(p.watermark(&part()), Some(100 * SEC));
        let st = p.process(&part(), &msgs(2, vec![touch("b", "u", 50 * SEC, "seo")], now), &mut out).unwrap();
        if want_late {
            assert!(matches!(&st[0], MsgStatus::Rejected(r) if r.reason == RejectReason::Late), "{st:?}");
            assert_eq!(out.dead_letters.len(), 1);
            assert_eq!(out.dead_letters[0].offset, Some(2));
        } else {
            assert_eq!(st, vec![MsgStatus::Accepted]);
            assert!(out.dead_letters.is_empty());
        }
        // The conversion at 200s credits the touches that were applied.
        p.process(&part(), &msgs(3, vec![conversion("c", "u", 200 * SEC)], now), &mut out).unwrap();
        assert_eq!(out.credit.len(), if want_late { 1 } else { 2 });
    }
}

#[test]
fn rollback_returns_to_the_committed_state() {
    let mut p = pipeline(config(), Store::temporary().unwrap());
    p.open_partition(&part(), Payload::Event(Format::Json)).unwrap();
    let now = Instant::now();
    let mut out = OutputBatch::default();
    p.process(&part(), &msgs(1, vec![touch("a", "u", 100 * SEC, "email")], now), &mut out).unwrap();
    p.commit().unwrap();
    // A batch whose output could not be written is rolled back...
    let batch = msgs(2, vec![touch("b", "u", 150 * SEC, "seo"), conversion("c", "u", 200 * SEC)], now);
    let mut lost = OutputBatch::default();
    let first = p.process(&part(), &batch, &mut lost).unwrap();
    assert_eq!(lost.credit.len(), 2);
    p.rollback().unwrap();
    assert_eq!(p.watermark(&part()), Some(100 * SEC));
    assert_eq!(p.committed_offsets(), vec![(part(), 1)]);
    // ... and its re-delivery is applied again, not dropped as duplicates,
    // with the same rows.
    let mut again = OutputBatch::default();
    let second = p.process(&part(), &batch, &mut again).unwrap();
    assert_eq!(first, second);
    assert_eq!(lost, again);
}

#[test]
fn an_idle_partition_advances_with_processing_time() {
    // expiry 1 h: a journey whose last touch is at 100s expires once the
    // watermark passes 100s + 1h. Input stops; after idle_timeout (60 s of
    // processing time) the watermark moves on by the time passed.
    let cfg = Config { expiry: Period(3600 * SEC), ..config() };
    let mut p = pipeline(cfg, Store::temporary().unwrap());
    p.open_partition(&part(), Payload::Event(Format::Json)).unwrap();
    let t0 = Instant::now();
    let mut out = OutputBatch::default();
    p.process(&part(), &msgs(1, vec![touch("a", "u", 100 * SEC, "email")], t0), &mut out).unwrap();
    p.tick(t0 + Duration::from_secs(59), &mut out).unwrap();
    assert_eq!(p.watermark(&part()), Some(100 * SEC), "not idle yet");
    p.tick(t0 + Duration::from_secs(61), &mut out).unwrap();
    assert_eq!(p.watermark(&part()), Some(161 * SEC));
    assert!(out.paths.is_empty());
    p.tick(t0 + Duration::from_secs(3602), &mut out).unwrap();
    assert_eq!(out.paths.len(), 1, "expired after the idle advance");
    assert!(!out.paths[0].converted);
}

#[test]
fn statistics_of_another_markov_order_are_refused_at_open() {
    // A store written with markov_order = 2, opened with the default 1: a
    // clear error naming both, instead of a panic when the statistics merge.
    let dir = tempfile::tempdir().unwrap();
    let cfg2 = Config { models: vec![ModelId::Markov], markov_order: 2, ..config() };
    {
        let mut p = pipeline(cfg2, Store::open(dir.path()).unwrap());
        p.open_partition(&part(), Payload::Event(Format::Json)).unwrap();
        let now = Instant::now();
        let mut out = OutputBatch::default();
        let batch = msgs(1, vec![touch("a", "u", 100 * SEC, "email"), conversion("c", "u", 200 * SEC)], now);
        p.process(&part(), &batch, &mut out).unwrap();
        p.flush().unwrap();
    }
    let cfg1 = Config { models: vec![ModelId::Markov], ..config() };
    let mut p = pipeline(cfg1, Store::open(dir.path()).unwrap());
    let e = format!("{:#}", p.open_partition(&part(), Payload::Event(Format::Json)).unwrap_err());
    assert!(e.contains("markov_order = 2") && e.contains("says 1"), "{e}");
}

/// An in-memory sink that keeps every batch.
#[derive(Clone, Default)]
struct Collect(Arc<Mutex<OutputBatch>>);

impl Sink for Collect {
    fn name(&self) -> &'static str {
        "file"
    }
    fn write(&mut self, batch: &OutputBatch) -> Result<(), SinkError> {
        let mut all = self.0.lock().unwrap();
        all.credit.extend(batch.credit.iter().cloned());
        all.paths.extend(batch.paths.iter().cloned());
        all.dead_letters.extend(batch.dead_letters.iter().cloned());
        Ok(())
    }
    fn close(&mut self) -> Result<(), SinkError> {
        Ok(())
    }
}

/// The run loop over a finite source writes the rows replay writes for the
/// same time-ordered events (docs/contract.md, "Determinism").
#[test]
fn run_loop_over_a_finite_source_equals_replay() {
    let mut lines: Vec<Vec<u8>> = Vec::new();
    for u in 0..20 {
        let user = format!("u{u}");
        for k in 0..3 {
            let ch = ["email", "seo", "social"][(u + k) % 3];
            lines.push(touch(&format!("t{u}-{k}"), &user, (u as i64 * 7 + k as i64) * 3600 * SEC, ch));
        }
        if u % 3 != 0 {
            lines.push(conversion(&format!("c{u}"), &user, (u as i64 * 7 + 5) * 3600 * SEC));
        }
    }
    lines.sort_by_key(|l| serde_json::from_slice::<serde_json::Value>(l).unwrap()["timestamp"].as_i64().unwrap());
    let cfg = Config { models: ModelId::RULES.to_vec(), ..config() };
    let sink = Collect::default();
    let source = MemorySource::new(part(), Payload::Event(Format::Json), lines.clone(), 7);
    let metrics = Metrics::new(prometheus::Registry::new());
    run_loop(
        pipeline(cfg.clone(), Store::temporary().unwrap()),
        Box::new(source),
        vec![Box::new(sink.clone())],
        Arc::new(AtomicBool::new(false)),
        metrics,
        Arc::new(Mutex::new(Shared::default())),
    )
    .unwrap();
    let text: Vec<String> = lines.iter().map(|l| String::from_utf8(l.clone()).unwrap()).collect();
    let refs: Vec<&str> = text.iter().map(String::as_str).collect();
    let want = replay_lines(&refs, cfg.rules(), &Pseudonymizer::new(KEY), &ModelPlan::rules());
    let got = sink.0.lock().unwrap();
    let sorted = |rows: &[apportion_contract::CreditRow]| {
        let mut v: Vec<String> = rows.iter().map(|r| serde_json::to_string(r).unwrap()).collect();
        v.sort();
        v
    };
    assert!(!want.rows.is_empty());
    assert_eq!(sorted(&got.credit), sorted(&want.rows));
    assert_eq!(got.paths.len(), want.paths.len());
}
