//! The real exposition of a running service, checked by Prometheus' own
//! linter (`promtool check metrics`): no warnings allowed.

use std::io::Write;
use std::process::{Command, Stdio};
use std::time::Duration;

use apportion_e2e::*;

#[test]
fn promtool_accepts_the_exposition() {
    let promtool = match Command::new("promtool").arg("--version").output() {
        Ok(o) if o.status.success() => "promtool",
        _ => {
            if std::env::var_os("APPORTION_REQUIRE_SERVERS").is_some() {
                panic!("promtool not installed: run deploy/dev/promtool.sh");
            }
            eprintln!("skipped: promtool not installed");
            return;
        }
    };
    let dir = tempfile::tempdir().unwrap();
    let (admin, ingest) = (free_port(), free_port());
    let cfg = dir.path().join("c.toml");
    std::fs::write(
        &cfg,
        format!(
            "data_dir = \"{}\"\nmodels = [\"linear\", \"shapley\", \"markov\"]\nrefit_interval = \"1s\"\nallowed_lateness = \"0s\"\n[admin]\nlisten = \"127.0.0.1:{admin}\"\n[embedded]\nhttp_listen = \"127.0.0.1:{ingest}\"\noutput_dir = \"{}\"\n",
            dir.path().join("data").display(),
            dir.path().join("out").display()
        ),
    )
    .unwrap();
    let mut s = Serve::start(&cfg, admin, &dir.path().join("serve.log"));
    s.wait_ready(Duration::from_secs(30));
    let body = concat!(
        r#"{"type":"touch","event_id":"a","user_id":"u","timestamp":"2026-06-01T10:00:00Z","channel":"email"}"#,
        "\n",
        r#"{"type":"conversion","event_id":"b","user_id":"u","timestamp":"2026-06-01T11:00:00Z"}"#,
        "\n",
        "bad\n",
    );
    http(ingest, "POST", "/v1/events", body.as_bytes()).unwrap();
    // The conversion is credited once the refit and the batch are through:
    // wait for its row to be counted rather than for a fixed time.
    let want = "apportion_credit_rows_total{model=\"shapley\"} 1";
    let deadline = std::time::Instant::now() + Duration::from_secs(30);
    let text = loop {
        let (status, text) = s.get("/metrics").unwrap();
        assert_eq!(status, 200);
        if text.contains(want) || std::time::Instant::now() > deadline {
            break text;
        }
        std::thread::sleep(Duration::from_millis(100));
    };
    assert!(text.contains(want), "{text}");
    let mut p = Command::new(promtool)
        .args(["check", "metrics"])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    p.stdin.take().unwrap().write_all(text.as_bytes()).unwrap();
    let o = p.wait_with_output().unwrap();
    let report = format!("{}{}", String::from_utf8_lossy(&o.stdout), String::from_utf8_lossy(&o.stderr));
    assert!(o.status.success() && report.trim().is_empty(), "promtool check metrics: {report}");
    // The refit (every second here) picks up the closed path: wait for it.
    let deadline = std::time::Instant::now() + Duration::from_secs(30);
    let (models, v) = loop {
        let (_, models) = s.get("/v1/models").unwrap();
        let v: serde_json::Value = serde_json::from_str(&models).unwrap();
        if v["paths"] == 1 || std::time::Instant::now() > deadline {
            break (models, v);
        }
        std::thread::sleep(Duration::from_millis(100));
    };
    let markov =
        v["models"].as_array().unwrap().iter().find(|m| m["model"] == "markov").expect("markov listed").clone();
    // The fitted weights: one converting path email -> removal effect 1
    // (derived by hand from the definition, docs/contract.md "Models": the
    // chain START -> email -> CONVERSION has P = 1, and without email
    // P_-email = 0, so RE = 1 - 0/1 = 1).
    assert_eq!(markov["removal_effects"][0]["channel"], "email", "{models}");
    assert_eq!(markov["removal_effects"][0]["removal_effect"], 1.0, "{models}");
    assert!(markov["model_version"].as_str().unwrap().starts_with("markov-o1-"));
    assert_eq!(s.signal("TERM").code(), Some(0));
}
