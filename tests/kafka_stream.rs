//! `serve` on a real broker: streaming equals batch, restarts, repartition,
//! bad messages, watermark-driven expiry.
//! Check values: the rows of `apportion replay` on the same events (the
//! contract, docs/contract.md "Determinism"), the number of conversions the
//! generator wrote, and reasons derived by hand from "Reject reasons".

use std::collections::{BTreeMap, HashMap, HashSet};
use std::time::Duration;

use apportion_e2e::*;
use serde_json::Value;

const START: i64 = 1_780_000_000_000; // 2026-05-28, invented scenario time

fn write_events(dir: &std::path::Path, events: &[GenEvent]) -> std::path::PathBuf {
    let p = dir.join("events.ndjson");
    let text: String = events.iter().map(|e| format!("{}\n", e.line)).collect();
    std::fs::write(&p, text).unwrap();
    p
}

fn conversions(events: &[GenEvent]) -> usize {
    events.iter().filter(|e| e.conversion).count()
}

fn distinct_conversions(rows: &[Value]) -> usize {
    rows.iter().map(|r| r["conversion_id"].as_str().unwrap().to_string()).collect::<HashSet<_>>().len()
}

/// Stream a scenario through serve and compare with replay on the same
/// events: identical credit rows for every rule model.
#[test]
fn streaming_equals_replay() {
    let Some(brokers) = server("APPORTION_TEST_KAFKA") else { return };
    let prefix = unique("eq");
    let dir = tempfile::tempdir().unwrap();
    create_topics(&brokers, &[&format!("{prefix}-events")], 4, &[]);
    let mut events = scenario(400, 11, START);
    events.sort_by_key(|e| e.ts);
    shuffle_within(&mut events, 1500, 5);
    let file = write_events(dir.path(), &events);
    let want = replay(&file, &["--models", "last_touch,first_touch,linear,time_decay,u_shaped"]);
    assert_eq!(distinct_conversions(&want), conversions(&events));

    let msgs: Vec<_> = events.iter().map(|e| (Some(e.user.clone()), e.line.as_bytes().to_vec(), None)).collect();
    produce(&brokers, &format!("{prefix}-events"), &msgs);
    let admin = free_port();
    let cfg = kafka_config(dir.path(), &brokers, admin, &prefix, true, "");
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    let got =
        consume_until(&brokers, &format!("{prefix}-credit"), Duration::from_secs(120), |rows| rows.len() >= want.len());
    assert_eq!(got.len(), want.len(), "log: {}", std::fs::read_to_string(&s.log).unwrap());
    assert_eq!(canonical(&got), canonical(&want));
    assert_eq!(s.signal("TERM").code(), Some(0));
}

fn check_restart(sig: &str) {
    let Some(brokers) = server("APPORTION_TEST_KAFKA") else { return };
    let prefix = unique(&format!("rs{}", sig.to_lowercase()));
    let dir = tempfile::tempdir().unwrap();
    create_topics(&brokers, &[&format!("{prefix}-events")], 4, &[]);
    let mut events = scenario(1500, 23, START);
    events.sort_by_key(|e| e.ts);
    let file = write_events(dir.path(), &events);
    let want = replay(&file, &["--models", "last_touch,first_touch,linear,time_decay,u_shaped"]);
    let msgs: Vec<_> = events.iter().map(|e| (Some(e.user.clone()), e.line.as_bytes().to_vec(), None)).collect();
    produce(&brokers, &format!("{prefix}-events"), &msgs);

    let admin = free_port();
    let cfg = kafka_config(dir.path(), &brokers, admin, &prefix, true, "");
    // Small batches so that the stop lands mid-stream; a killed member
    // leaves the group when its session times out (the broker's smallest).
    let text = std::fs::read_to_string(&cfg).unwrap().replace("batch_size = 500", "batch_size = 50");
    std::fs::write(&cfg, format!("{text}[kafka.properties]\n\"session.timeout.ms\" = \"6000\"\n")).unwrap();
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    // Wait until some, but not all, credit has been produced.
    let partial = consume_until(&brokers, &format!("{prefix}-credit"), Duration::from_secs(60), |r| r.len() >= 200);
    assert!(partial.len() < want.len(), "stream finished before the stop; make the scenario larger");
    let status = s.signal(sig);
    if sig == "TERM" {
        assert_eq!(status.code(), Some(0), "graceful stop must exit 0: {}", std::fs::read_to_string(&s.log).unwrap());
    }
    drop(s);
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    let want_ids: HashSet<String> = want.iter().map(|r| r["credit_id"].as_str().unwrap().to_string()).collect();
    let got = consume_until(&brokers, &format!("{prefix}-credit"), Duration::from_secs(180), |rows| {
        rows.iter().map(|r| r["credit_id"].as_str().unwrap()).collect::<HashSet<_>>().len() >= want_ids.len()
    });
    // No conversion missing; duplicates only as identical rows.
    assert_same_credit_at_least_once(&got, &want, &s.log);
    if sig == "TERM" {
        assert_eq!(got.len(), want.len(), "a graceful stop commits everything it produced: no duplicates expected");
    }
    eprintln!("restart after SIG{sig}: {} rows consumed for {} distinct", got.len(), want.len());
    assert_eq!(s.signal("TERM").code(), Some(0));
}

#[test]
fn restart_after_sigterm_loses_nothing() {
    check_restart("TERM");
}

#[test]
fn restart_after_sigkill_loses_nothing() {
    check_restart("KILL");
}

/// Input keyed at random goes through the repartition topic and gives the
/// same credit as input keyed by user.
#[test]
fn repartition_gives_the_same_credit() {
    let Some(brokers) = server("APPORTION_TEST_KAFKA") else { return };
    let prefix = unique("rp");
    let dir = tempfile::tempdir().unwrap();
    create_topics(&brokers, &[&format!("{prefix}-events")], 3, &[]);
    create_topics(&brokers, &[&format!("{prefix}-repart")], 4, &[]);
    let mut events = scenario(300, 31, START);
    events.sort_by_key(|e| e.ts);
    let file = write_events(dir.path(), &events);
    let want = replay(&file, &["--models", "last_touch,first_touch,linear,time_decay,u_shaped"]);
    // Keys unrelated to the user, spread over 3 partitions: a user's events
    // meet again only through the repartition topic. Every event time of a
    // user is distinct, so their order does not depend on arrival.
    let msgs: Vec<_> = events
        .iter()
        .enumerate()
        .map(|(i, e)| (Some(format!("k{}", (i * 7919) % 1013)), e.line.as_bytes().to_vec(), Some((i % 3) as i32)))
        .collect();
    produce(&brokers, &format!("{prefix}-events"), &msgs);
    let admin = free_port();
    // Partitions are read in any interleaving: a lateness longer than the
    // scenario keeps every event on time.
    let cfg = kafka_config(dir.path(), &brokers, admin, &prefix, false, "");
    let text =
        std::fs::read_to_string(&cfg).unwrap().replace("allowed_lateness = \"2s\"", "allowed_lateness = \"30d\"");
    std::fs::write(&cfg, text).unwrap();
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    wait_accepted(&s, events.len() as u64, Duration::from_secs(120));
    // Then move every watermark past the scenario with touches of many
    // other users at the present time (their keys land on every repartition
    // partition; the present, because events ahead of it are rejected).
    let present =
        std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_millis() as i64 - 60_000;
    let sentinels: Vec<_> = (0..64)
        .map(|k| {
            let line = format!(
                r#"{{"type":"touch","event_id":"sentinel-{k}","user_id":"sentinel-{k}","timestamp":{present},"channel":"none"}}"#,
            );
            (Some(format!("s{k}")), line.into_bytes(), Some(k % 3))
        })
        .collect();
    produce(&brokers, &format!("{prefix}-events"), &sentinels);
    let got =
        consume_until(&brokers, &format!("{prefix}-credit"), Duration::from_secs(120), |rows| rows.len() >= want.len());
    assert_eq!(canonical(&got), canonical(&want), "log: {}", std::fs::read_to_string(&s.log).unwrap());
    assert_eq!(s.signal("TERM").code(), Some(0));
}

/// Waits until the service has accepted `n` events (from /metrics).
/// Bad messages land in the dead-letter topic with their reason; the good
/// ones around them are credited.
#[test]
fn bad_messages_go_to_the_dead_letter_topic() {
    let Some(brokers) = server("APPORTION_TEST_KAFKA") else { return };
    let prefix = unique("bad");
    let dir = tempfile::tempdir().unwrap();
    create_topics(&brokers, &[&format!("{prefix}-events")], 1, &[("max.message.bytes", "4000000")]);
    let t = START;
    let good1 = format!(r#"{{"type":"touch","event_id":"g1","user_id":"u1","timestamp":{t},"channel":"email"}}"#);
    let good2 = format!(r#"{{"type":"conversion","event_id":"g2","user_id":"u1","timestamp":{},"value":5}}"#, t + 1000);
    let big = format!(
        r#"{{"type":"touch","event_id":"big","user_id":"u2","timestamp":{t},"channel":"{}"}}"#,
        "x".repeat(2 << 20)
    );
    let far =
        format!(r#"{{"type":"touch","event_id":"later","user_id":"u9","timestamp":{},"channel":"email"}}"#, t + 60_000);
    let msgs: Vec<(Option<String>, Vec<u8>, Option<i32>)> = vec![
        (None, good1.into_bytes(), Some(0)),
        (None, b"this is not json".to_vec(), Some(0)),
        (None, format!(r#"{{"type":"touch","user_id":"u3","timestamp":{t},"channel":"email"}}"#).into_bytes(), Some(0)),
        (
            None,
            r#"{"type":"touch","event_id":"x4","user_id":"u4","timestamp":"soon","channel":"email"}"#.to_string()
                .into_bytes(),
            Some(0),
        ),
        (
            None,
            format!(r#"{{"type":"conversion","event_id":"x5","user_id":"u5","timestamp":{t},"value":"ten"}}"#)
                .into_bytes(),
            Some(0),
        ),
        (None, big.into_bytes(), Some(0)),
        (None, good2.into_bytes(), Some(0)),
        (None, far.into_bytes(), Some(0)),
    ];
    produce(&brokers, &format!("{prefix}-events"), &msgs);
    let admin = free_port();
    let cfg = kafka_config(dir.path(), &brokers, admin, &prefix, true, "");
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    let dead = consume_until(&brokers, &format!("{prefix}-dead"), Duration::from_secs(60), |r| r.len() >= 5);
    let reasons: BTreeMap<i64, String> =
        dead.iter().map(|d| (d["offset"].as_i64().unwrap(), d["reason"].as_str().unwrap().to_string())).collect();
    assert_eq!(
        reasons,
        BTreeMap::from([
            (1, "invalid_json".to_string()),
            (2, "missing_event_id".to_string()),
            (3, "invalid_timestamp".to_string()),
            (4, "invalid_value".to_string()),
            (5, "too_large".to_string()),
        ])
    );
    for d in &dead {
        assert_eq!(d["source"], format!("{prefix}-events"));
        assert_eq!(d["partition"], 0);
        assert!(!d.to_string().contains("\"u"), "no raw user id in dead letters: {d}");
    }
    let credit = consume_until(&brokers, &format!("{prefix}-credit"), Duration::from_secs(60), |r| r.len() >= 5);
    assert_eq!(credit.len(), 5, "one row per rule model for g2");
    assert!(credit.iter().all(|r| r["conversion_id"] == "g2" && r["touch_event_id"] == "g1"));
    // The service is still alive and counted the rejections.
    let (_, metrics) = s.get("/metrics").unwrap();
    assert!(metrics.contains("apportion_events_rejected_total{reason=\"too_large\"} 1"), "{metrics}");
    assert_eq!(s.signal("TERM").code(), Some(0));
}

/// A journey with no conversion closes as a non-converting path once the
/// watermark passes its expiry, also on a partition that goes quiet.
#[test]
fn idle_partition_still_expires_journeys() {
    let Some(brokers) = server("APPORTION_TEST_KAFKA") else { return };
    let prefix = unique("idle");
    let dir = tempfile::tempdir().unwrap();
    create_topics(&brokers, &[&format!("{prefix}-events")], 2, &[]);
    let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_millis() as i64;
    let msgs = vec![
        (
            None,
            format!(r#"{{"type":"touch","event_id":"a1","user_id":"ua","timestamp":{now},"channel":"email"}}"#)
                .into_bytes(),
            Some(0),
        ),
        (
            None,
            format!(
                r#"{{"type":"touch","event_id":"a2","user_id":"ua","timestamp":{},"channel":"social"}}"#,
                now + 100
            )
            .into_bytes(),
            Some(0),
        ),
        (
            None,
            format!(r#"{{"type":"touch","event_id":"b1","user_id":"ub","timestamp":{now},"channel":"video"}}"#)
                .into_bytes(),
            Some(1),
        ),
    ];
    produce(&brokers, &format!("{prefix}-events"), &msgs);
    let admin = free_port();
    let cfg = kafka_config(dir.path(), &brokers, admin, &prefix, true, "expiry = \"3s\"");
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    // No more input: only the idle advance can move the watermarks.
    let paths = consume_until(&brokers, &format!("{prefix}-paths"), Duration::from_secs(60), |r| r.len() >= 2);
    let mut got: Vec<(bool, String)> = paths
        .iter()
        .map(|p| {
            let chans: Vec<&str> = p["channels"].as_array().unwrap().iter().map(|c| c.as_str().unwrap()).collect();
            (p["converted"].as_bool().unwrap(), chans.join(">"))
        })
        .collect();
    got.sort();
    assert_eq!(got, vec![(false, "email>social".to_string()), (false, "video".to_string())]);
    let (_, metrics) = s.get("/metrics").unwrap();
    assert!(metrics.contains("apportion_journeys_closed_total{reason=\"expired\"} 2"), "{metrics}");
    assert_eq!(s.signal("TERM").code(), Some(0));
}

/// Topics in the protobuf encoding (proto/apportion/v1): the same events
/// give the same credit as JSON replay.
#[test]
fn protobuf_topics_give_the_same_credit() {
    let Some(brokers) = server("APPORTION_TEST_KAFKA") else { return };
    let prefix = unique("pb");
    let dir = tempfile::tempdir().unwrap();
    create_topics(&brokers, &[&format!("{prefix}-events")], 2, &[]);
    let mut events = scenario(150, 41, START);
    events.sort_by_key(|e| e.ts);
    let file = write_events(dir.path(), &events);
    let want = replay(&file, &["--models", "last_touch,first_touch,linear,time_decay,u_shaped"]);
    let mut msgs: Vec<_> = events
        .iter()
        .map(|e| (Some(e.user.clone()), apportion_wire::encode_event_protobuf(&e.line).unwrap(), None))
        .collect();
    msgs.push((None, b"\xff\xff not protobuf".to_vec(), Some(0)));
    produce(&brokers, &format!("{prefix}-events"), &msgs);
    let admin = free_port();
    let cfg = kafka_config(dir.path(), &brokers, admin, &prefix, true, "");
    let text = std::fs::read_to_string(&cfg).unwrap().replace(
        "input_keyed_by_user = true",
        "input_keyed_by_user = true\ninput_format = \"protobuf\"\noutput_format = \"protobuf\"",
    );
    std::fs::write(&cfg, text).unwrap();
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    let decode = |b: &[u8]| {
        serde_json::to_value(apportion_wire::decode_credit_protobuf(b).expect("protobuf credit row")).unwrap()
    };
    let got = consume_until_with(&brokers, &format!("{prefix}-credit"), Duration::from_secs(120), decode, |rows| {
        rows.len() >= want.len()
    });
    let (g, w) = (canonical(&got), canonical(&want));
    let only_got: Vec<&String> = g.iter().filter(|r| !w.contains(r)).take(2).collect();
    let only_want: Vec<&String> = w.iter().filter(|r| !g.contains(r)).take(2).collect();
    assert!(
        only_got.is_empty() && only_want.is_empty() && g.len() == w.len(),
        "only in stream: {only_got:?}\nonly in replay: {only_want:?}"
    );
    let dead = consume_until_with(
        &brokers,
        &format!("{prefix}-dead"),
        Duration::from_secs(30),
        |b| {
            serde_json::to_value(apportion_wire::decode_dead_letter_protobuf(b).expect("protobuf dead letter")).unwrap()
        },
        |r| !r.is_empty(),
    );
    assert_eq!(dead.len(), 1);
    // Undecodable bytes: rejected with a contract reason, not a crash.
    let reason = dead[0]["reason"].as_str().unwrap();
    assert!(["invalid_json", "missing_type"].contains(&reason), "{reason}");
    assert_eq!(s.signal("TERM").code(), Some(0));
}

/// The repartition stage (input not keyed by user) writes its dead letters
/// in the configured output format, as the main stage does (the contract's
/// "Dead letters" in either encoding).
#[test]
fn repartition_dead_letters_use_the_output_format() {
    let Some(brokers) = server("APPORTION_TEST_KAFKA") else { return };
    let prefix = unique("rpdl");
    let dir = tempfile::tempdir().unwrap();
    create_topics(&brokers, &[&format!("{prefix}-events")], 1, &[]);
    create_topics(&brokers, &[&format!("{prefix}-repart")], 1, &[]);
    let t = START;
    let bad = format!(r#"{{"type":"conversion","event_id":"x1","user_id":"u1","timestamp":{t},"currency":"eur"}}"#);
    produce(&brokers, &format!("{prefix}-events"), &[(None, bad.into_bytes(), Some(0))]);
    let admin = free_port();
    let cfg = kafka_config(dir.path(), &brokers, admin, &prefix, false, "");
    let text = std::fs::read_to_string(&cfg)
        .unwrap()
        .replace("input_keyed_by_user = false", "input_keyed_by_user = false\noutput_format = \"protobuf\"");
    std::fs::write(&cfg, text).unwrap();
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    let dead = consume_until_with(
        &brokers,
        &format!("{prefix}-dead"),
        Duration::from_secs(60),
        |b| {
            serde_json::to_value(apportion_wire::decode_dead_letter_protobuf(b).expect("a protobuf dead letter"))
                .unwrap()
        },
        |r| !r.is_empty(),
    );
    assert_eq!(dead.len(), 1, "log: {}", std::fs::read_to_string(&s.log).unwrap());
    assert_eq!(dead[0]["reason"], "invalid_currency");
    assert_eq!(dead[0]["source"], format!("{prefix}-events"));
    assert_eq!(dead[0]["event_id"], "x1");
    let (_, metrics) = s.get("/metrics").unwrap();
    assert!(
        metrics.contains("apportion_events_consumed_total{outcome=\"rejected\",type=\"conversion\"} 1"),
        "the rejected event is counted under its kind: {metrics}"
    );
    assert_eq!(s.signal("TERM").code(), Some(0));
}

/// Repartitioned input where one input partition is ten minutes behind the
/// other: the repartition stage carries each input partition's progress, and
/// a repartitioned partition's watermark follows the slowest input partition
/// that still has a backlog, so the lagging partition's events are on time
/// (none in the dead-letter topic) and the credit equals replay's.
#[test]
fn repartition_keeps_a_lagging_input_partition_on_time() {
    let Some(brokers) = server("APPORTION_TEST_KAFKA") else { return };
    let prefix = unique("lag");
    let dir = tempfile::tempdir().unwrap();
    create_topics(&brokers, &[&format!("{prefix}-events")], 2, &[]);
    create_topics(&brokers, &[&format!("{prefix}-repart")], 2, &[]);
    // Two groups of users; the second group's events are ten minutes older.
    let mut fast = scenario(120, 51, START);
    // (User and event ids carry the seed, so the groups do not overlap.)
    let mut slow = scenario(120, 52, START - 10 * 60_000);
    fast.sort_by_key(|e| e.ts);
    slow.sort_by_key(|e| e.ts);
    let mut all: Vec<GenEvent> = fast.iter().chain(slow.iter()).cloned().collect();
    all.sort_by_key(|e| e.ts);
    let file = write_events(dir.path(), &all);
    let want = replay(&file, &["--models", "last_touch,first_touch,linear,time_decay,u_shaped"]);
    // Input partition 0 holds the newer events, partition 1 the older ones,
    // each in time order: whatever the interleaving of the two, the older
    // partition is behind.
    let mut msgs: Vec<_> = fast.iter().map(|e| (None, e.line.as_bytes().to_vec(), Some(0))).collect();
    msgs.extend(slow.iter().map(|e| (None, e.line.as_bytes().to_vec(), Some(1))));
    produce(&brokers, &format!("{prefix}-events"), &msgs);
    let admin = free_port();
    let cfg = kafka_config(dir.path(), &brokers, admin, &prefix, false, "");
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    wait_accepted(&s, all.len() as u64, Duration::from_secs(120));
    let got =
        consume_until(&brokers, &format!("{prefix}-credit"), Duration::from_secs(120), |rows| rows.len() >= want.len());
    let (_, metrics) = s.get("/metrics").unwrap();
    assert!(metrics.contains("apportion_events_rejected_total{reason=\"late\"} 0"), "nothing late: {metrics}");
    assert_eq!(canonical(&got), canonical(&want), "log: {}", std::fs::read_to_string(&s.log).unwrap());
    assert_eq!(s.signal("TERM").code(), Some(0));
}

/// kill -9 in the middle of a stream credited by the data-driven models,
/// refitted every second, then a restart: every conversion is credited, and
/// a credit row delivered twice (its batch was written, then redelivered
/// after the crash) is the same row both times, model_version and credit
/// included: the redelivered batch used the snapshot committed with the
/// offsets, not a refit made after the restart.
#[test]
fn restart_after_sigkill_keeps_data_driven_credit() {
    let Some(brokers) = server("APPORTION_TEST_KAFKA") else { return };
    let prefix = unique("rsdd");
    let dir = tempfile::tempdir().unwrap();
    create_topics(&brokers, &[&format!("{prefix}-events")], 4, &[]);
    let mut events = scenario(600, 29, START);
    events.sort_by_key(|e| e.ts);
    // The conversions replay credits (the reference for which are credited;
    // its data-driven values differ by design: it fits once on everything).
    let file = write_events(dir.path(), &events);
    let want = replay(&file, &["--models", "shapley,markov"]);
    let conversions = distinct_conversions(&want);
    let msgs: Vec<_> = events.iter().map(|e| (Some(e.user.clone()), e.line.as_bytes().to_vec(), None)).collect();
    produce(&brokers, &format!("{prefix}-events"), &msgs);
    let admin = free_port();
    let cfg = kafka_config(dir.path(), &brokers, admin, &prefix, true, "refit_interval = \"1s\"");
    let text = std::fs::read_to_string(&cfg).unwrap().replace("batch_size = 500", "batch_size = 50").replace(
        r#"models = ["last_touch", "first_touch", "linear", "time_decay", "u_shaped"]"#,
        r#"models = ["shapley", "markov"]"#,
    );
    // A killed member leaves the group only when its session times out:
    // the broker's smallest session keeps the restarts quick.
    std::fs::write(&cfg, format!("{text}[kafka.properties]\n\"session.timeout.ms\" = \"6000\"\n")).unwrap();
    for round in 0..3 {
        let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
        s.wait_ready(Duration::from_secs(60));
        let target = 100 * (round + 1);
        let _ = consume_until(&brokers, &format!("{prefix}-credit"), Duration::from_secs(60), |r| r.len() >= target);
        s.signal("KILL");
    }
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    let got = consume_until(&brokers, &format!("{prefix}-credit"), Duration::from_secs(120), |rows| {
        rows.iter().map(|r| r["conversion_id"].as_str().unwrap()).collect::<HashSet<_>>().len() >= conversions
    });
    let mut by_id: HashMap<String, Value> = HashMap::new();
    let mut twice = 0;
    for r in &got {
        let id = r["credit_id"].as_str().unwrap().to_string();
        if let Some(prev) = by_id.get(&id) {
            assert_eq!(prev, r, "credit_id {id} delivered with two different values");
            twice += 1;
        }
        by_id.insert(id, r.clone());
    }
    let credited: HashSet<&str> = got.iter().map(|r| r["conversion_id"].as_str().unwrap()).collect();
    let want_ids: HashSet<&str> = want.iter().map(|r| r["conversion_id"].as_str().unwrap()).collect();
    let missing: Vec<&&str> = want_ids.difference(&credited).collect();
    if !missing.is_empty() {
        let dead = consume_until(&brokers, &format!("{prefix}-dead"), Duration::from_secs(5), |_| false);
        eprintln!("MISSING {missing:?}; dead letters: {dead:?}");
        for m in &missing {
            for e in events.iter().filter(|e| e.line.contains(&format!("\"{m}\""))) {
                eprintln!("EVENT {}", e.line);
            }
        }
    }
    assert_eq!(credited.len(), conversions, "missing {missing:?}; log: {}", std::fs::read_to_string(&s.log).unwrap());
    let versions: HashSet<&str> = got.iter().filter_map(|r| r["model_version"].as_str()).collect();
    assert!(versions.len() > 2, "the models were refitted along the way: {versions:?}");
    eprintln!("data-driven restarts: {} rows, {twice} delivered twice, {} snapshots", got.len(), versions.len());
    assert_eq!(s.signal("TERM").code(), Some(0));
}

/// The broker restarts while the repartition stage and the main stage are
/// working: both keep retrying (nothing is fatal), nothing is lost, and the
/// credit equals replay's. Runs on a broker of its own.
#[test]
fn broker_restart_during_repartitioning() {
    if server("APPORTION_TEST_KAFKA").is_none() {
        return;
    }
    let broker = PrivateBroker::start();
    let brokers = broker.brokers.clone();
    let prefix = unique("brr");
    let dir = tempfile::tempdir().unwrap();
    create_topics(&brokers, &[&format!("{prefix}-events")], 2, &[]);
    create_topics(&brokers, &[&format!("{prefix}-repart")], 2, &[]);
    let mut events = scenario(400, 61, START);
    events.sort_by_key(|e| e.ts);
    let file = write_events(dir.path(), &events);
    let want = replay(&file, &["--models", "last_touch,first_touch,linear,time_decay,u_shaped"]);
    let msgs: Vec<_> = events
        .iter()
        .enumerate()
        .map(|(i, e)| (Some(format!("k{}", (i * 7919) % 1013)), e.line.as_bytes().to_vec(), Some((i % 2) as i32)))
        .collect();
    produce(&brokers, &format!("{prefix}-events"), &msgs);
    let admin = free_port();
    let cfg = kafka_config(dir.path(), &brokers, admin, &prefix, false, "");
    let text = std::fs::read_to_string(&cfg)
        .unwrap()
        .replace("allowed_lateness = \"2s\"", "allowed_lateness = \"30d\"")
        .replace("batch_size = 500", "batch_size = 50");
    std::fs::write(&cfg, text).unwrap();
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    // Some of the input through, then the broker goes away and comes back.
    let t = std::time::Instant::now();
    while t.elapsed() < Duration::from_secs(60) {
        let accepted = s.get("/metrics").map_or(0.0, |(_, m)| {
            m.lines()
                .filter(|l| l.starts_with("apportion_events_consumed_total{") && l.contains("outcome=\"accepted\""))
                .filter_map(|l| l.rsplit(' ').next()?.parse::<f64>().ok())
                .sum::<f64>()
        });
        if accepted >= 100.0 {
            break;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    broker.restart();
    assert!(
        s.child.try_wait().unwrap().is_none(),
        "serve exited when the broker restarted: {}",
        std::fs::read_to_string(&s.log).unwrap()
    );
    wait_accepted(&s, events.len() as u64, Duration::from_secs(180));
    let present =
        std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_millis() as i64 - 60_000;
    let sentinels: Vec<_> = (0..64)
        .map(|k| {
            let line = format!(
                r#"{{"type":"touch","event_id":"sentinel-{k}","user_id":"sentinel-{k}","timestamp":{present},"channel":"none"}}"#,
            );
            (Some(format!("s{k}")), line.into_bytes(), Some(k % 2))
        })
        .collect();
    produce(&brokers, &format!("{prefix}-events"), &sentinels);
    let got = consume_until(&brokers, &format!("{prefix}-credit"), Duration::from_secs(120), |rows| {
        rows.iter().map(|r| r["credit_id"].as_str().unwrap()).collect::<HashSet<_>>().len() >= want.len()
    });
    // At least once: a row may come twice, always the same row.
    let mut by_id: HashMap<String, Value> = HashMap::new();
    for r in &got {
        let id = r["credit_id"].as_str().unwrap().to_string();
        if let Some(prev) = by_id.get(&id) {
            assert_eq!(prev, r, "credit_id {id} delivered with two different values");
        }
        by_id.insert(id, r.clone());
    }
    let unique_rows: Vec<Value> = by_id.into_values().collect();
    assert_eq!(canonical(&unique_rows), canonical(&want), "log: {}", std::fs::read_to_string(&s.log).unwrap());
    assert_eq!(s.signal("TERM").code(), Some(0));
}

/// `POST /v1/erase` on the admin listener in Kafka mode (contract: HTTP
/// ingest, Erase; derived by hand): off without an admin token (404), 401
/// without the bearer token, and with it the erase reaches every input
/// partition: u-gone's touch is dropped (its later conversion is
/// `unattributed`, one row per model), u-kept keeps its credit, and the
/// audit records name u-gone's key (the key its credit rows carry) and the
/// request id. Keyed input: one record per input partition (each applies
/// its copy). Repartitioned input: the copies meet on one partition and
/// the second is a duplicate, so one record.
fn erase_endpoint(keyed: bool) {
    let Some(brokers) = server("APPORTION_TEST_KAFKA") else { return };
    let prefix = unique(if keyed { "erk" } else { "eru" });
    let dir = tempfile::tempdir().unwrap();
    create_topics(&brokers, &[&format!("{prefix}-events"), &format!("{prefix}-repart")], 2, &[]);
    let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_millis() as i64;
    let touch = |id: &str, user: &str, ts: i64| {
        format!(r#"{{"type":"touch","event_id":"{id}","user_id":"{user}","timestamp":{ts},"channel":"email"}}"#)
            .into_bytes()
    };
    produce(
        &brokers,
        &format!("{prefix}-events"),
        &[(None, touch("t1", "u-gone", now - 60_000), Some(0)), (None, touch("t2", "u-kept", now - 60_000), Some(1))],
    );
    let admin = free_port();
    let cfg = kafka_config(dir.path(), &brokers, admin, &prefix, keyed, "");
    let plain = std::fs::read_to_string(&cfg).unwrap();
    // First without a token: the endpoint is off.
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    let body = br#"{"user_id":"u-gone","request_id":"req-1"}"#;
    let (status, _, text) = http_with(admin, "POST", "/v1/erase", &[], body).unwrap();
    assert_eq!((status, text.contains("admin token")), (404, true), "{text}");
    wait_accepted(&s, 2, Duration::from_secs(60));
    assert_eq!(s.signal("TERM").code(), Some(0));
    std::fs::write(&cfg, plain.replace("[admin]\n", "[admin]\ntoken = \"erase-me-token\"\n")).unwrap();
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    let (status, head, _) = http_with(admin, "POST", "/v1/erase", &[], body).unwrap();
    assert_eq!(status, 401);
    assert!(head.contains("www-authenticate: bearer"), "{head}");
    let auth = ["Authorization: Bearer erase-me-token"];
    let (status, _, text) = http_with(admin, "POST", "/v1/erase", &auth, b"{\"user\":\"u-gone\"}").unwrap();
    assert_eq!(status, 400, "{text}");
    let (status, _, text) = http_with(admin, "POST", "/v1/erase", &auth, body).unwrap();
    assert_eq!(status, 202, "{text}");
    let answer: Value = serde_json::from_str(&text).unwrap();
    assert_eq!(answer["partitions"], 2, "{answer}");
    assert_eq!(answer["request_id"], "req-1");
    // Conversions after the erase (later than its time, so not late).
    let later = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_millis() as i64 + 1_000;
    let conv = |id: &str, user: &str| {
        format!(r#"{{"type":"conversion","event_id":"{id}","user_id":"{user}","timestamp":{later}}}"#).into_bytes()
    };
    produce(
        &brokers,
        &format!("{prefix}-events"),
        &[(None, conv("c1", "u-gone"), Some(0)), (None, conv("c2", "u-kept"), Some(1))],
    );
    let credit = consume_until(&brokers, &format!("{prefix}-credit"), Duration::from_secs(60), |r| r.len() >= 10);
    assert_eq!(credit.len(), 10, "{credit:?}");
    let gone: Vec<&Value> = credit.iter().filter(|r| r["conversion_id"] == "c1").collect();
    assert!(gone.iter().all(|r| r["channel"] == "unattributed"), "{gone:?}");
    assert!(credit.iter().filter(|r| r["conversion_id"] == "c2").all(|r| r["touch_event_id"] == "t2"), "{credit:?}");
    let want_records = if keyed { 2 } else { 1 };
    let records =
        consume_until(&brokers, &format!("{prefix}-erasures"), Duration::from_secs(30), |r| r.len() >= want_records);
    assert_eq!(records.len(), want_records, "{records:?}");
    assert!(records.iter().all(|r| r["user_key"] == gone[0]["user_key"] && r["request_id"] == "req-1"), "{records:?}");
    let deleted: i64 = records.iter().map(|r| r["touches_deleted"].as_i64().unwrap()).sum();
    assert_eq!(deleted, 1, "{records:?}");
    assert_eq!(s.signal("TERM").code(), Some(0));
}

#[test]
fn erase_endpoint_reaches_every_keyed_partition() {
    erase_endpoint(true);
}

#[test]
fn erase_endpoint_through_the_repartition_stage() {
    erase_endpoint(false);
}
