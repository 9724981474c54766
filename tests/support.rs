//! Helpers shared by the end-to-end tests: locating the binary, talking to
//! the real Kafka broker started by deploy/dev/kafka.sh, running `apportion`
//! processes, and a seeded scenario generator.
//!
//! A test that needs a server reads its address from the environment
//! (`APPORTION_TEST_KAFKA`, `APPORTION_TEST_POSTGRES`). Without it the test
//! prints why it is skipped, unless `APPORTION_REQUIRE_SERVERS` is set
//! (scripts/test.sh sets it), in which case it fails.

use std::io::{Read, Write};
use std::net::TcpStream;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use rdkafka::admin::{AdminClient, AdminOptions, NewTopic, TopicReplication};
use rdkafka::client::DefaultClientContext;
use rdkafka::config::ClientConfig;
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::message::Message;
use rdkafka::producer::{BaseProducer, BaseRecord, Producer};
use rdkafka::{Offset, TopicPartitionList};
use serde_json::Value;

/// The pseudonymization key used by every e2e test.
pub const KEY: &str = "e2e-test-key-0123456789";

/// The server address from `var`, or None (test skipped) when unset.
pub fn server(var: &str) -> Option<String> {
    match std::env::var(var) {
        Ok(v) if !v.is_empty() => Some(v),
        _ => {
            if std::env::var_os("APPORTION_REQUIRE_SERVERS").is_some() {
                panic!("{var} is not set but APPORTION_REQUIRE_SERVERS is: start the servers with scripts/test.sh");
            }
            eprintln!("skipped: {var} not set (run scripts/test.sh to start the servers)");
            None
        }
    }
}

/// The `apportion` binary next to this test executable.
pub fn bin() -> PathBuf {
    let exe = std::env::current_exe().expect("test executable path");
    let dir = exe.parent().and_then(Path::parent).expect("target/<profile>");
    let b = dir.join("apportion");
    assert!(b.exists(), "{} not built: run `cargo test --workspace` (it builds the binary)", b.display());
    b
}

/// A command running the `apportion` binary with none of the developer's
/// `APPORTION_*` variables (so that a configuration in the developer's shell
/// cannot change what a test sees); tests set what they need.
pub fn apportion() -> Command {
    let mut c = Command::new(bin());
    for (k, _) in std::env::vars_os() {
        if k.to_string_lossy().starts_with("APPORTION_") {
            c.env_remove(k);
        }
    }
    c
}

/// A unique name for topics and groups of one test.
pub fn unique(prefix: &str) -> String {
    let t = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_nanos();
    format!("{prefix}-{}-{}", std::process::id(), t % 1_000_000_000)
}

/// A free TCP port on 127.0.0.1.
pub fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

/// Creates topics with `partitions` each (and optional topic configs).
pub fn create_topics(brokers: &str, names: &[&str], partitions: i32, configs: &[(&str, &str)]) {
    let admin: AdminClient<DefaultClientContext> =
        ClientConfig::new().set("bootstrap.servers", brokers).create().expect("admin client");
    let topics: Vec<NewTopic> = names
        .iter()
        .map(|n| {
            let mut t = NewTopic::new(n, partitions, TopicReplication::Fixed(1));
            for (k, v) in configs {
                t = t.set(k, v);
            }
            t
        })
        .collect();
    let opts = AdminOptions::new().operation_timeout(Some(Duration::from_secs(30)));
    for r in futures_block_on(admin.create_topics(topics.iter(), &opts)).expect("create topics") {
        r.expect("topic created");
    }
}

/// Minimal executor for the admin client's futures (no async runtime needed).
/// Drives a future to completion on this thread (the admin client's futures need no runtime).
pub fn futures_block_on<F: std::future::Future>(f: F) -> F::Output {
    use std::sync::{Arc, Condvar, Mutex};
    use std::task::{Context, Poll, Wake, Waker};
    struct Signal(Mutex<bool>, Condvar);
    impl Wake for Signal {
        fn wake(self: Arc<Self>) {
            *self.0.lock().unwrap() = true;
            self.1.notify_one();
        }
    }
    let signal = Arc::new(Signal(Mutex::new(false), Condvar::new()));
    let waker = Waker::from(signal.clone());
    let mut cx = Context::from_waker(&waker);
    let mut f = std::pin::pin!(f);
    loop {
        if let Poll::Ready(v) = f.as_mut().poll(&mut cx) {
            return v;
        }
        let mut woken = signal.0.lock().unwrap();
        while !*woken {
            woken = signal.1.wait(woken).unwrap();
        }
        *woken = false;
    }
}

/// Produces `(key, payload, partition)` messages and waits for delivery.
pub fn produce(brokers: &str, topic: &str, msgs: &[(Option<String>, Vec<u8>, Option<i32>)]) {
    let p: BaseProducer = ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("message.max.bytes", "4000000")
        .set("linger.ms", "5")
        .create()
        .expect("producer");
    for (k, v, part) in msgs {
        let mut rec = BaseRecord::to(topic).payload(v);
        if let Some(k) = k {
            rec = rec.key(k);
        }
        if let Some(pp) = part {
            rec = rec.partition(*pp);
        }
        let mut rec = rec;
        loop {
            match p.send(rec) {
                Ok(()) => break,
                Err((_, r)) => {
                    p.poll(Duration::from_millis(50));
                    rec = r;
                }
            }
        }
    }
    p.flush(Duration::from_secs(60)).expect("flush");
}

/// Reads every message of `topic` from the beginning until `done` says so
/// or `timeout` passes. Returns the JSON payloads.
pub fn consume_until(brokers: &str, topic: &str, timeout: Duration, done: impl FnMut(&[Value]) -> bool) -> Vec<Value> {
    consume_until_with(brokers, topic, timeout, |b| serde_json::from_slice(b).expect("JSON message"), done)
}

/// Like [`consume_until`], with a payload decoder.
pub fn consume_until_with(
    brokers: &str,
    topic: &str,
    timeout: Duration,
    decode: impl Fn(&[u8]) -> Value,
    mut done: impl FnMut(&[Value]) -> bool,
) -> Vec<Value> {
    let mut decoded: Vec<Value> = Vec::new();
    let raw = consume_raw_until(brokers, topic, timeout, |msgs| {
        decoded.extend(msgs[decoded.len()..].iter().map(|(_, payload)| decode(payload)));
        done(&decoded)
    });
    decoded.extend(raw[decoded.len()..].iter().map(|(_, payload)| decode(payload)));
    decoded
}

/// Reads every message of `topic` from the beginning until `done` says so
/// (asked whenever no message is waiting) or `timeout` passes. Returns each
/// message's key (empty when it has none) and payload, as stored.
pub fn consume_raw_until(
    brokers: &str,
    topic: &str,
    timeout: Duration,
    mut done: impl FnMut(&[(Vec<u8>, Vec<u8>)]) -> bool,
) -> Vec<(Vec<u8>, Vec<u8>)> {
    let c: BaseConsumer = ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("group.id", unique("reader"))
        .set("enable.auto.commit", "false")
        .set("auto.offset.reset", "earliest")
        // Records of aborted transactions are never read (the librdkafka
        // default, named because exactly-once checks rely on it).
        .set("isolation.level", "read_committed")
        .create()
        .expect("consumer");
    let start = Instant::now();
    // The service's output topics appear when it first writes to them.
    let parts = loop {
        let md = c.fetch_metadata(Some(topic), Duration::from_secs(10)).expect("metadata");
        let t = &md.topics()[0];
        if t.error().is_none() && !t.partitions().is_empty() {
            break t.partitions().len() as i32;
        }
        if start.elapsed() >= timeout {
            return Vec::new();
        }
        std::thread::sleep(Duration::from_millis(300));
    };
    let mut tpl = TopicPartitionList::new();
    for p in 0..parts {
        tpl.add_partition_offset(topic, p, Offset::Beginning).unwrap();
    }
    c.assign(&tpl).expect("assign");
    let mut out = Vec::new();
    while start.elapsed() < timeout {
        match c.poll(Duration::from_millis(200)) {
            Some(Ok(m)) => out.push((m.key().unwrap_or_default().to_vec(), m.payload().unwrap_or_default().to_vec())),
            Some(Err(e)) => eprintln!("consumer error: {e}"),
            None => {
                if done(&out) {
                    break;
                }
            }
        }
    }
    out
}

/// A running `apportion serve`.
pub struct Serve {
    /// The process.
    pub child: Child,
    /// Admin port.
    pub admin: u16,
    /// Log file.
    pub log: PathBuf,
}

impl Serve {
    /// Starts `apportion serve --config cfg` with the test key.
    pub fn start(cfg: &Path, admin: u16, log: &Path) -> Serve {
        let f = std::fs::OpenOptions::new().create(true).append(true).open(log).unwrap();
        let child = apportion()
            .arg("--config")
            .arg(cfg)
            .arg("serve")
            .env("APPORTION_PSEUDONYM_KEY", KEY)
            .env("APPORTION_LOG_FORMAT", "text")
            .stdout(Stdio::null())
            .stderr(f)
            .spawn()
            .expect("start serve");
        Serve { child, admin, log: log.to_path_buf() }
    }

    /// GET a path on the admin port: (status, body).
    pub fn get(&self, path: &str) -> Option<(u16, String)> {
        http_get(self.admin, path)
    }

    /// Waits until /readyz answers 200.
    pub fn wait_ready(&mut self, timeout: Duration) {
        let start = Instant::now();
        while start.elapsed() < timeout {
            if let Some(status) = self.child.try_wait().unwrap() {
                panic!("serve exited with {status}: {}", std::fs::read_to_string(&self.log).unwrap_or_default());
            }
            if let Some((200, _)) = self.get("/readyz") {
                return;
            }
            std::thread::sleep(Duration::from_millis(200));
        }
        panic!("serve not ready after {timeout:?}: {}", std::fs::read_to_string(&self.log).unwrap_or_default());
    }

    /// Waits up to `timeout` for the process to exit on its own.
    pub fn wait_exit(&mut self, timeout: Duration) -> Option<std::process::ExitStatus> {
        let start = Instant::now();
        while start.elapsed() < timeout {
            if let Some(s) = self.child.try_wait().unwrap() {
                return Some(s);
            }
            std::thread::sleep(Duration::from_millis(100));
        }
        None
    }

    /// Sends a signal (e.g. `STOP`, `CONT`) and returns at once.
    pub fn send_signal(&self, sig: &str) {
        Command::new("kill").arg(format!("-{sig}")).arg(self.child.id().to_string()).status().unwrap();
    }

    /// Sends a signal and waits for the exit status.
    pub fn signal(&mut self, sig: &str) -> std::process::ExitStatus {
        self.send_signal(sig);
        let start = Instant::now();
        loop {
            if let Some(s) = self.child.try_wait().unwrap() {
                return s;
            }
            if start.elapsed() > Duration::from_secs(60) {
                let _ = self.child.kill();
                panic!("serve did not exit after SIG{sig}");
            }
            std::thread::sleep(Duration::from_millis(100));
        }
    }
}

impl Drop for Serve {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// A plain HTTP/1.0 GET on 127.0.0.1:port.
pub fn http_get(port: u16, path: &str) -> Option<(u16, String)> {
    http(port, "GET", path, b"")
}

/// A plain HTTP/1.0 request on 127.0.0.1:port: (status, body).
pub fn http(port: u16, method: &str, path: &str, body: &[u8]) -> Option<(u16, String)> {
    let mut s = TcpStream::connect(("127.0.0.1", port)).ok()?;
    s.set_read_timeout(Some(Duration::from_secs(30))).ok()?;
    write!(s, "{method} {path} HTTP/1.0\r\nHost: localhost\r\nContent-Length: {}\r\n\r\n", body.len()).ok()?;
    s.write_all(body).ok()?;
    let mut buf = Vec::new();
    s.read_to_end(&mut buf).ok()?;
    let text = String::from_utf8_lossy(&buf).into_owned();
    let status = text.split_whitespace().nth(1)?.parse().ok()?;
    let body = text.split_once("\r\n\r\n").map(|x| x.1.to_string()).unwrap_or_default();
    Some((status, body))
}

/// An HTTP/1.0 request with extra header lines (each `Name: value`):
/// (status, the head in lower case, the body).
pub fn http_with(port: u16, method: &str, path: &str, headers: &[&str], body: &[u8]) -> Option<(u16, String, String)> {
    let mut s = TcpStream::connect(("127.0.0.1", port)).ok()?;
    s.set_read_timeout(Some(Duration::from_secs(60))).ok()?;
    let mut head = format!("{method} {path} HTTP/1.0\r\nHost: localhost\r\nContent-Length: {}\r\n", body.len());
    for h in headers {
        head.push_str(h);
        head.push_str("\r\n");
    }
    head.push_str("\r\n");
    s.write_all(head.as_bytes()).ok()?;
    // A server may answer (401, 413) and close before reading the whole body.
    let _ = s.write_all(body);
    let mut buf = Vec::new();
    let _ = s.read_to_end(&mut buf);
    let text = String::from_utf8_lossy(&buf).into_owned();
    let status = text.split_whitespace().nth(1)?.parse().ok()?;
    let (h, b) = text.split_once("\r\n\r\n").unwrap_or((&text, ""));
    Some((status, h.to_ascii_lowercase(), b.to_string()))
}

/// Runs `apportion replay` on `input` and returns the credit rows.
pub fn replay(input: &Path, extra: &[&str]) -> Vec<Value> {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("credit.ndjson");
    let o = apportion()
        .args(["replay", "--quiet", "--input"])
        .arg(input)
        .arg("--output")
        .arg(&out)
        .args(extra)
        .env("APPORTION_PSEUDONYM_KEY", KEY)
        .output()
        .unwrap();
    assert!(o.status.success(), "replay failed: {}", String::from_utf8_lossy(&o.stderr));
    std::fs::read_to_string(&out).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect()
}

/// One generated event.
#[derive(Debug, Clone)]
pub struct GenEvent {
    /// Raw user id.
    pub user: String,
    /// Event time, ms.
    pub ts: i64,
    /// The JSON line.
    pub line: String,
    /// True for conversions.
    pub conversion: bool,
}

/// A seeded scenario: `users` users of an invented shop, touches and
/// conversions over a few days, timestamps in ms. Invented data (demo only).
pub fn scenario(users: u32, seed: u64, start_ms: i64) -> Vec<GenEvent> {
    let mut s = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
    let mut next = move || {
        s ^= s >> 12;
        s ^= s << 25;
        s ^= s >> 27;
        s.wrapping_mul(0x2545_F491_4F6C_DD1D)
    };
    let channels = ["paid_search", "email", "social", "display", "affiliate"];
    let mut out = Vec::new();
    let mut id = 0u64;
    for u in 0..users {
        let user = format!("visitor-{seed}-{u}");
        let n = 1 + next() % 5;
        let mut t = start_ms + (next() % (3 * 86_400_000)) as i64;
        for _ in 0..n {
            id += 1;
            let ch = channels[(next() % channels.len() as u64) as usize];
            let view = next() % 4 == 0;
            out.push(GenEvent {
                user: user.clone(),
                ts: t,
                line: format!(
                    r#"{{"type":"touch","event_id":"e{seed}-{id}","user_id":"{user}","timestamp":{t},"channel":"{ch}","campaign":"c{}","interaction":"{}"}}"#,
                    next() % 3,
                    if view { "view" } else { "click" }
                ),
                conversion: false,
            });
            t += (next() % 40_000_000) as i64 + 1;
            if next() % 4 == 0 {
                id += 1;
                out.push(GenEvent {
                    user: user.clone(),
                    ts: t,
                    line: format!(
                        r#"{{"type":"conversion","event_id":"e{seed}-{id}","user_id":"{user}","timestamp":{t},"value":{}.5,"currency":"EUR","goal":"purchase"}}"#,
                        10 + next() % 200
                    ),
                    conversion: true,
                });
                t += (next() % 1_000_000) as i64 + 1;
            }
        }
    }
    out
}

/// Shuffles events within `jitter_ms` of event time (arrival order =
/// time + a jitter below `jitter_ms`), deterministically.
pub fn shuffle_within(events: &mut [GenEvent], jitter_ms: i64, seed: u64) {
    let mut s = seed | 1;
    let mut keyed: Vec<(i64, usize)> = events
        .iter()
        .enumerate()
        .map(|(i, e)| {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            (e.ts + (s % jitter_ms.max(1) as u64) as i64, i)
        })
        .collect();
    keyed.sort();
    let copy = events.to_vec();
    for (slot, (_, i)) in keyed.into_iter().enumerate() {
        events[slot] = copy[i].clone();
    }
}

/// Rows as sorted canonical JSON strings.
pub fn canonical(rows: &[Value]) -> Vec<String> {
    let mut v: Vec<String> = rows.iter().map(|r| r.to_string()).collect();
    v.sort();
    v
}

/// Writes a serve config for Kafka.
#[allow(clippy::too_many_arguments)]
pub fn kafka_config(dir: &Path, brokers: &str, admin: u16, prefix: &str, keyed: bool, extra: &str) -> PathBuf {
    let cfg = format!(
        r#"data_dir = "{data}"
models = ["last_touch", "first_touch", "linear", "time_decay", "u_shaped"]
allowed_lateness = "2s"
idle_timeout = "1s"
batch_size = 500
# Fixed batches (tests replace "batch_size = 500", which changes both).
max_batch_size = 500
{extra}
[admin]
listen = "127.0.0.1:{admin}"
[log]
format = "text"
level = "info"
[kafka]
brokers = "{brokers}"
group_id = "{prefix}-group"
input_topics = ["{prefix}-events"]
credit_topic = "{prefix}-credit"
paths_topic = "{prefix}-paths"
dead_letter_topic = "{prefix}-dead"
erasure_topic = "{prefix}-erasures"
repartition_topic = "{prefix}-repart"
input_keyed_by_user = {keyed}
"#,
        data = dir.join("data").display()
    );
    let p = dir.join("apportion.toml");
    std::fs::write(&p, cfg).unwrap();
    p
}

/// A broker of a test's own (deploy/dev/kafka.sh with its own run
/// directory), for tests that restart it. Stopped (and its data deleted)
/// when dropped.
pub struct PrivateBroker {
    run_dir: tempfile::TempDir,
    /// `127.0.0.1:PORT`.
    pub brokers: String,
}

impl PrivateBroker {
    fn script() -> PathBuf {
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../deploy/dev/kafka.sh")
    }

    fn run(&self, cmd: &str) -> String {
        let o = Command::new("bash")
            .arg(Self::script())
            .arg(cmd)
            .env("APPORTION_DEV_RUN_DIR", self.run_dir.path())
            .output()
            .expect("run kafka.sh");
        let text = format!("{}{}", String::from_utf8_lossy(&o.stdout), String::from_utf8_lossy(&o.stderr));
        assert!(o.status.success(), "kafka.sh {cmd} failed: {text}");
        text
    }

    /// Starts a broker on free ports.
    pub fn start() -> PrivateBroker {
        let mut b = PrivateBroker { run_dir: tempfile::tempdir().unwrap(), brokers: String::new() };
        let out = b.run("start");
        b.brokers = out
            .lines()
            .find_map(|l| l.strip_prefix("export APPORTION_TEST_KAFKA="))
            .expect("kafka.sh start prints the address")
            .trim()
            .to_string();
        b
    }

    /// Stops the broker and starts it again on the same port, data kept.
    pub fn restart(&self) {
        self.run("restart");
    }
}

impl Drop for PrivateBroker {
    fn drop(&mut self) {
        let _ = Command::new("bash")
            .arg(Self::script())
            .arg("stop")
            .env("APPORTION_DEV_RUN_DIR", self.run_dir.path())
            .output();
    }
}

/// Waits until `s` has accepted at least `n` events (its metrics).
pub fn wait_accepted(s: &Serve, n: u64, timeout: Duration) {
    let start = std::time::Instant::now();
    let mut seen = 0;
    while start.elapsed() < timeout {
        if let Some((200, m)) = s.get("/metrics") {
            seen = m
                .lines()
                .filter(|l| l.starts_with("apportion_events_consumed_total{") && l.contains("outcome=\"accepted\""))
                .filter_map(|l| l.rsplit(' ').next()?.parse::<f64>().ok())
                .sum::<f64>() as u64;
            if seen >= n {
                return;
            }
        }
        std::thread::sleep(Duration::from_millis(300));
    }
    let metrics = s.get("/metrics").map(|m| m.1).unwrap_or_default();
    let consumed: Vec<&str> =
        metrics.lines().filter(|l| l.starts_with("apportion_events_consumed_total{") && !l.ends_with(" 0")).collect();
    panic!("only {seen} of {n} events accepted ({consumed:?}): {}", std::fs::read_to_string(&s.log).unwrap());
}

/// At-least-once delivery of `want`: every credit row of `want` in `got`,
/// nothing else, and a row seen twice is the same row both times (rows
/// carry deterministic ids). Returns the number of repeated rows.
pub fn assert_same_credit_at_least_once(got: &[Value], want: &[Value], log: &Path) -> usize {
    let mut by_id: std::collections::HashMap<String, Value> = std::collections::HashMap::new();
    for r in got {
        let id = r["credit_id"].as_str().unwrap().to_string();
        if let Some(prev) = by_id.get(&id) {
            assert_eq!(prev, r, "credit_id {id} seen with two different values");
        }
        by_id.insert(id, r.clone());
    }
    let want_ids: std::collections::HashSet<String> =
        want.iter().map(|r| r["credit_id"].as_str().unwrap().to_string()).collect();
    let got_ids: std::collections::HashSet<String> = by_id.keys().cloned().collect();
    assert_eq!(got_ids, want_ids, "log: {}", std::fs::read_to_string(log).unwrap_or_default());
    let unique_rows: Vec<Value> = by_id.into_values().collect();
    assert_eq!(canonical(&unique_rows), canonical(want));
    got.len() - unique_rows.len()
}
