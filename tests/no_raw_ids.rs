//! No raw user id anywhere (issue 15): a scenario whose raw ids are easy to
//! recognise goes through `serve` (embedded, a followed file, debug logs)
//! and `replay`, including lines that are rejected (the dead letters), a
//! duplicate, a late event and an erase. Then every file of the state
//! store, every output, every log line and /metrics are searched for the
//! raw ids: zero hits. The rule is the contract's (docs/contract.md, "Input
//! events": the raw id is never stored, logged, counted in a metric label or
//! written to an output).

use std::path::{Path, PathBuf};
use std::process::Stdio;
use std::time::{Duration, Instant};

use apportion_e2e::{apportion, free_port, http_get, KEY};

/// Every raw id of the scenario starts with this; nothing else in the input
/// holds it.
const MARK: &str = "QuokkaRawId";

fn lines() -> Vec<String> {
    let t0: i64 = 1_780_000_000_000;
    let mut v = Vec::new();
    for u in 0..20 {
        let user = format!("{MARK}-{u:04}@example.test");
        for k in 0..3 {
            v.push(format!(
                r#"{{"type":"touch","event_id":"t{u}-{k}","user_id":"{user}","timestamp":{},"channel":"ch{k}"}}"#,
                t0 + (u * 10 + k) * 1000
            ));
        }
        v.push(format!(
            r#"{{"type":"conversion","event_id":"c{u}","user_id":"{user}","timestamp":{},"value":10}}"#,
            t0 + (u * 10 + 5) * 1000
        ));
    }
    let end = t0 + 300_000;
    // Rejected lines that carry a raw id, each for another reason.
    v.push(format!(r#"{{"type":"touch","event_id":"bad1","user_id":"{MARK}-bad1","timestamp":{end},"channel":"x","interaction":"poke"}}"#));
    v.push(format!(
        r#"{{"type":"touch","event_id":"bad2","user_id":"{MARK}-{}","timestamp":{end},"channel":"x"}}"#,
        "y".repeat(300)
    ));
    v.push(format!(
        r#"{{"type":"touch","event_id":"bad3","user_id":["{MARK}-in-an-array"],"timestamp":{end},"channel":"x"}}"#
    ));
    v.push(format!(
        r#"{{"type":"touch","event_id":"bad4","user_id":"{MARK}-bad4","timestamp":"not a time","channel":"x"}}"#
    ));
    v.push(format!(r#"{{"type":"touch","event_id":"bad5","user_id":"{MARK}-bad5","timestamp":{end}"#));
    v.push(format!(r#"{{"type":"poke","event_id":"bad6","user_id":"{MARK}-bad6","timestamp":{end}}}"#));
    // A duplicate, a late touch (allowed lateness 0), an erase.
    v.push(format!(
        r#"{{"type":"touch","event_id":"t0-0","user_id":"{MARK}-0000@example.test","timestamp":{end},"channel":"ch0"}}"#
    ));
    v.push(format!(r#"{{"type":"touch","event_id":"late","user_id":"{MARK}-late","timestamp":{t0},"channel":"ch0"}}"#));
    v.push(format!(
        r#"{{"type":"touch","event_id":"t-open","user_id":"{MARK}-open","timestamp":{end},"channel":"ch1"}}"#
    ));
    v.push(format!(r#"{{"type":"erase","user_id":"{MARK}-0001@example.test","timestamp":{end}}}"#));
    v
}

/// Every file under `dir`, recursively.
fn files(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let Ok(rd) = std::fs::read_dir(dir) else { return out };
    for e in rd.flatten() {
        let p = e.path();
        if p.is_dir() {
            out.extend(files(&p));
        } else {
            out.push(p);
        }
    }
    out
}

fn holds_mark(bytes: &[u8]) -> bool {
    bytes.windows(MARK.len()).any(|w| w == MARK.as_bytes())
}

/// The files under `dirs` (and the named texts) that hold a raw id.
fn hits(dirs: &[&Path], texts: &[(&str, &str)]) -> Vec<String> {
    let mut found: Vec<String> = dirs
        .iter()
        .flat_map(|d| files(d))
        .filter(|f| holds_mark(&std::fs::read(f).unwrap_or_default()))
        .map(|f| f.display().to_string())
        .collect();
    found.extend(texts.iter().filter(|(_, t)| holds_mark(t.as_bytes())).map(|(n, _)| n.to_string()));
    found
}

#[test]
fn no_raw_id_in_state_logs_metrics_or_output() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("input").join("events.ndjson");
    std::fs::create_dir_all(input.parent().unwrap()).unwrap();
    std::fs::write(&input, lines().iter().map(|l| format!("{l}\n")).collect::<String>()).unwrap();

    // replay, with a persistent store and every output.
    let rdir = dir.path().join("replay");
    std::fs::create_dir_all(&rdir).unwrap();
    let o = apportion()
        .args(["replay", "--input"])
        .arg(&input)
        .arg("--output")
        .arg(rdir.join("credit.ndjson"))
        .arg("--paths")
        .arg(rdir.join("paths.ndjson"))
        .arg("--rejected")
        .arg(rdir.join("rejected.ndjson"))
        .arg("--data-dir")
        .arg(rdir.join("state"))
        .env("APPORTION_PSEUDONYM_KEY", KEY)
        .env("APPORTION_LOG_LEVEL", "debug")
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let rejected = std::fs::read_to_string(rdir.join("rejected.ndjson")).unwrap();
    assert!(rejected.lines().count() >= 6, "the bad lines are rejected: {rejected}");
    let credit_rows = std::fs::read_to_string(rdir.join("credit.ndjson")).unwrap().lines().count();
    assert!(credit_rows > 0);
    let replay_err = String::from_utf8_lossy(&o.stderr).into_owned();
    let found = hits(&[&rdir], &[("replay stderr", &replay_err)]);
    assert!(found.is_empty(), "raw ids found in replay's files: {found:?}");

    // serve, embedded, following the file, debug logs.
    let sdir = dir.path().join("serve");
    let out = sdir.join("out");
    let admin = free_port();
    let cfg = dir.path().join("apportion.toml");
    std::fs::write(
        &cfg,
        format!(
            "data_dir = \"{}\"\nallowed_lateness = \"0s\"\nidle_timeout = \"1s\"\n[admin]\nlisten = \"127.0.0.1:{admin}\"\n[embedded]\nhttp_listen = \"\"\nwatch_file = \"{}\"\noutput_dir = \"{}\"\n[log]\nformat = \"json\"\nlevel = \"debug\"\n",
            sdir.join("data").display(),
            input.display(),
            out.display()
        ),
    )
    .unwrap();
    let log = dir.path().join("serve.log");
    let mut child = apportion()
        .arg("--config")
        .arg(&cfg)
        .arg("serve")
        .env("APPORTION_PSEUDONYM_KEY", KEY)
        .stdout(std::fs::File::create(dir.path().join("serve.stdout")).unwrap())
        .stderr(std::fs::File::create(&log).unwrap())
        .stdin(Stdio::null())
        .spawn()
        .unwrap();
    // Wait until every line is applied (the dead letters of the bad lines
    // and the late one are written once the whole file was read).
    let t = Instant::now();
    let mut metrics = String::new();
    loop {
        assert!(child.try_wait().unwrap().is_none(), "serve exited: {}", std::fs::read_to_string(&log).unwrap());
        if let Some((200, m)) = http_get(admin, "/metrics") {
            let rejected: f64 = m
                .lines()
                .filter(|l| l.starts_with("apportion_events_rejected_total{"))
                .filter_map(|l| l.rsplit(' ').next()?.parse::<f64>().ok())
                .sum();
            metrics = m;
            if rejected >= 7.0 {
                break;
            }
        }
        assert!(t.elapsed() < Duration::from_secs(60), "serve did not apply the file: {metrics}");
        std::thread::sleep(Duration::from_millis(200));
    }
    std::process::Command::new("kill").arg("-TERM").arg(child.id().to_string()).status().unwrap();
    assert!(child.wait().unwrap().success(), "{}", std::fs::read_to_string(&log).unwrap());
    let serve_log = std::fs::read_to_string(&log).unwrap();
    assert!(serve_log.contains("DEBUG") || serve_log.contains("\"debug\""), "debug logging is on: {serve_log}");
    let written: usize = files(&out).iter().map(|f| std::fs::read(f).unwrap().len()).sum();
    assert!(written > 0, "serve wrote output");
    let found = hits(&[&sdir, &dir.path().join("serve.stdout")], &[("serve log", &serve_log), ("/metrics", &metrics)]);
    assert!(found.is_empty(), "raw ids found in serve's files: {found:?}");
    // The erase wrote one audit record naming the user by key only; the key
    // is checked against OpenSSL's HMAC-SHA256 (RFC 2104), an outside
    // implementation.
    let records: Vec<serde_json::Value> = files(&out)
        .iter()
        .filter(|f| f.file_name().unwrap().to_string_lossy().starts_with("erasures-"))
        .flat_map(|f| {
            std::fs::read_to_string(f).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect::<Vec<_>>()
        })
        .collect();
    assert_eq!(records.len(), 1, "{records:?}");
    let openssl = std::process::Command::new("sh")
        .arg("-c")
        .arg(format!("printf '%s' '{MARK}-0001@example.test' | openssl dgst -sha256 -hmac '{KEY}'"))
        .output()
        .unwrap();
    let digest = String::from_utf8_lossy(&openssl.stdout).trim().rsplit(' ').next().unwrap().to_string();
    assert_eq!(digest.len(), 64, "openssl printed {:?}", String::from_utf8_lossy(&openssl.stdout));
    assert_eq!(records[0]["user_key"], digest.as_str());
    assert_eq!(records[0]["touches_deleted"], 0, "user 1's journey was credited before the erase");
    // The check can fail: the input itself holds every raw id.
    assert!(!hits(&[input.parent().unwrap()], &[]).is_empty());
}

/// The same scenario through `serve` on the real broker, input not keyed by
/// user (so the internal repartition topic is used), debug logs: no raw id
/// in any message (key or payload) of the repartition, credit, path,
/// dead-letter, erasure or changelog topics, in the store, the log or /metrics. The
/// input topic itself holds them (the search is shown to find them there).
#[test]
fn no_raw_id_in_kafka_topics() {
    use apportion_e2e::{consume_raw_until, create_topics, kafka_config, produce, server, unique, Serve};
    let Some(brokers) = server("APPORTION_TEST_KAFKA") else { return };
    let prefix = unique("raw");
    let dir = tempfile::tempdir().unwrap();
    create_topics(&brokers, &[&format!("{prefix}-events"), &format!("{prefix}-repart")], 2, &[]);
    let msgs: Vec<(Option<String>, Vec<u8>, Option<i32>)> =
        lines().into_iter().enumerate().map(|(i, l)| (None, l.into_bytes(), Some((i % 2) as i32))).collect();
    produce(&brokers, &format!("{prefix}-events"), &msgs);
    let admin = free_port();
    let cfg = kafka_config(dir.path(), &brokers, admin, &prefix, false, "");
    let text = std::fs::read_to_string(&cfg)
        .unwrap()
        .replace("level = \"info\"", "level = \"debug\"")
        .replace("allowed_lateness = \"2s\"", "allowed_lateness = \"0s\"");
    std::fs::write(&cfg, text).unwrap();
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(60));
    let topic = |name: &str| format!("{prefix}-{name}");
    let wait = Duration::from_secs(90);
    // The six bad lines are dead letters (the "late" touch need not be: the
    // watermark follows the slower of the two input partitions); one erase
    // record.
    let dead = consume_raw_until(&brokers, &topic("dead"), wait, |m| m.len() >= 6);
    let texts: Vec<_> = dead.iter().map(|m| String::from_utf8_lossy(&m.1)).collect();
    assert!(dead.len() >= 6, "dead letters: {texts:?}");
    let erasures = consume_raw_until(&brokers, &topic("erasures"), wait, |m| !m.is_empty());
    assert_eq!(erasures.len(), 1);
    let credit = consume_raw_until(&brokers, &topic("credit"), wait, |m| !m.is_empty());
    assert!(!credit.is_empty(), "credit rows were written");
    let (_, metrics) = s.get("/metrics").unwrap();
    assert_eq!(s.signal("TERM").code(), Some(0));
    let short = Duration::from_secs(3);
    let mut found = Vec::new();
    // The changelog of the state (docs/contract.md, "State across
    // instances"): the repartition topic's, the input not being keyed.
    let changelog = format!("group-{prefix}-repart-changelog");
    for name in ["repart", "credit", "paths", "dead", "erasures", changelog.as_str()] {
        let all = consume_raw_until(&brokers, &topic(name), short, |_| false);
        if name != "paths" {
            assert!(!all.is_empty(), "topic {name} holds messages");
        }
        for (i, (key, payload)) in all.iter().enumerate() {
            if holds_mark(key) || holds_mark(payload) {
                found.push(format!("{name} message {i}: {}", String::from_utf8_lossy(payload)));
            }
        }
    }
    let serve_log = std::fs::read_to_string(&s.log).unwrap();
    assert!(serve_log.contains("DEBUG"), "debug logging is on");
    found.extend(hits(&[&dir.path().join("data")], &[("serve log", &serve_log), ("/metrics", &metrics)]));
    assert!(found.is_empty(), "raw ids found: {found:?}");
    // The search finds raw ids where they are: the input topic.
    let input = consume_raw_until(&brokers, &topic("events"), short, |_| false);
    assert!(input.iter().any(|(_, p)| holds_mark(p)), "the input holds the raw ids");
}
